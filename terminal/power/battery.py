"""The battery: state of charge, integrated exactly, and a ledger that balances.

Energy is integrated over *pieces*: intervals in which the harvest, the load
and the cell temperature are constant.  Within a piece the stored energy is
a straight line until it meets the full mark or the floor, and the point
where it meets one is found exactly, so a year of one-minute harvest pieces
and a 20 ms frame are both exact: no fixed time step, nothing lost in
rounding beyond the float's own.

The charge controller serves the load from the panel first; only the surplus
goes into the cells, at the chemistry's charge efficiency (the rest is the
*charge loss*), and only while the cells are below full and warm enough to
take charge.  A surplus the cells cannot take is *spilled* (full) or
*refused* (too cold to charge: lithium cells are never charged below 0 deg C).
A deficit comes from the cells down to the chemistry's floor; at the floor
the load disconnect opens and what the panel cannot cover goes *unserved*
(a brown-out).  So for any run::

    initial + harvested - consumed - charge_losses == final

where *harvested* is the panel energy used (by the load or the cells) and
*consumed* the energy the loads received.  :meth:`Ledger.balance` checks it.
"""

from __future__ import annotations

import dataclasses
import math
from collections.abc import Mapping

from ionotrail.terminal.errors import UsageError

JOULES_PER_WH = 3600.0


@dataclasses.dataclass(frozen=True, slots=True)
class Chemistry:
    name: str
    soc_floor: float
    """Lowest state of charge the cells may be taken to (the absolute floor)."""
    charge_efficiency: float
    """Energy stored per unit of surplus offered to the cells."""
    min_charge_c: float | None
    """No charging below this cell temperature (None: no such rule)."""


CHEMISTRIES: Mapping[str, Chemistry] = {
    # Deep-cycle lead-acid kept above half charge for cycle life, and about 85 %
    # charge efficiency (common practice, no source).
    "lead-acid": Chemistry("lead-acid", soc_floor=0.50, charge_efficiency=0.85, min_charge_c=None),
    # LiFePO4 used down to about 10 %, about 97 % charge efficiency, and never
    # charged below 0 deg C, which plates lithium (cell makers' datasheets;
    # common practice, no single source).
    "lifepo4": Chemistry("lifepo4", soc_floor=0.10, charge_efficiency=0.97, min_charge_c=0.0),
}


@dataclasses.dataclass(frozen=True, slots=True)
class BatterySpec:
    capacity_wh: float
    chemistry: Chemistry
    reserve: float = 0.25
    """Fraction of the usable window (floor to full) kept for alarm traffic."""
    conserve: float = 0.5
    """Fraction of the usable window below which routine traffic is deferred and batched."""

    def __post_init__(self) -> None:
        if not (isinstance(self.capacity_wh, (int, float)) and 0 < self.capacity_wh < 1e6):
            raise UsageError(f"battery capacity {self.capacity_wh!r} Wh must be a positive number below 1e6")
        if not 0 <= self.reserve < self.conserve < 1:
            raise UsageError(f"battery reserve {self.reserve!r} and conserve {self.conserve!r} must satisfy 0 <= reserve < conserve < 1")

    def soc_at(self, window_fraction: float) -> float:
        """The state of charge ``window_fraction`` of the way from the floor to full."""
        floor = self.chemistry.soc_floor
        return floor + window_fraction * (1.0 - floor)

    @property
    def reserve_soc(self) -> float:
        return self.soc_at(self.reserve)

    @property
    def conserve_soc(self) -> float:
        return self.soc_at(self.conserve)


@dataclasses.dataclass(slots=True)
class Ledger:
    """Where the energy went, in joules (``*_s`` in seconds)."""

    initial_j: float
    harvested_j: float = 0.0
    consumed_j: dict[str, float] = dataclasses.field(default_factory=dict)
    charge_losses_j: float = 0.0
    spilled_j: float = 0.0
    refused_j: float = 0.0
    unserved_j: float = 0.0
    refused_s: float = 0.0  # time the cells were too cold to take an offered surplus
    unserved_s: float = 0.0  # time the load disconnect was open

    def consumed_total_j(self) -> float:
        return math.fsum(self.consumed_j.values())

    def balance(self, final_j: float) -> float:
        """initial + harvested - consumed - losses - final: zero up to rounding."""
        return math.fsum([self.initial_j, self.harvested_j, -self.consumed_total_j(), -self.charge_losses_j, -final_j])


class Battery:
    """The cells and their charge controller at one site."""

    def __init__(self, spec: BatterySpec, soc: float) -> None:
        floor = spec.chemistry.soc_floor
        if not floor <= soc <= 1.0:
            raise UsageError(f"initial state of charge {soc!r} must lie between the {spec.chemistry.name} floor {floor} and 1")
        self.spec = spec
        self.capacity_j = spec.capacity_wh * JOULES_PER_WH
        self.floor_j = floor * self.capacity_j
        self.reserve_j = spec.reserve_soc * self.capacity_j
        self.stored_j = soc * self.capacity_j
        self.ledger = Ledger(initial_j=self.stored_j)
        self.soc_min = soc
        self.below_reserve_s = 0.0
        self._efficiency = spec.chemistry.charge_efficiency
        self._min_charge_c = spec.chemistry.min_charge_c

    @property
    def soc(self) -> float:
        return self.stored_j / self.capacity_j

    def run(self, seconds: float, harvest_w: float, loads: Mapping[str, float], temperature_c: float) -> None:
        """A piece of ``seconds`` with constant panel power, loads (watts by
        name) and cell temperature."""
        if not seconds >= 0 or not harvest_w >= 0:
            raise UsageError(f"a piece needs seconds >= 0 and harvest >= 0, not {seconds!r} s at {harvest_w!r} W")
        if seconds == 0:
            return
        load_w = math.fsum(loads.values())
        ledger = self.ledger
        e0 = self.stored_j
        net = harvest_w - load_w
        served_fraction = 1.0
        if net >= 0:
            surplus_j = net * seconds
            ledger.harvested_j += load_w * seconds
            may_charge = self._min_charge_c is None or temperature_c >= self._min_charge_c
            if not may_charge:
                if surplus_j > 0:
                    ledger.refused_j += surplus_j
                    ledger.refused_s += seconds
                accepted = 0.0
            else:
                accepted = min(surplus_j, max(0.0, self.capacity_j - e0) / self._efficiency)
                ledger.spilled_j += surplus_j - accepted
            ledger.harvested_j += accepted
            ledger.charge_losses_j += accepted * (1.0 - self._efficiency)
            e1 = min(self.capacity_j, e0 + accepted * self._efficiency)  # (capacity - e0) / eff * eff may round one ulp up
            if accepted == surplus_j:  # a straight line for the whole piece
                self._below(e0, e1, seconds)
            else:  # rises to full, then flat
                rise = accepted / net if net > 0 else 0.0
                self._below(e0, e1, rise)
                self._below(e1, e1, seconds - rise)
        else:
            ledger.harvested_j += harvest_w * seconds
            deficit_w = -net
            to_floor = max(0.0, e0 - self.floor_j) / deficit_w
            if to_floor >= seconds:
                e1 = e0 - deficit_w * seconds
                self._below(e0, e1, seconds)
            else:  # falls to the floor; the load disconnect opens for the rest
                e1 = self.floor_j
                self._below(e0, e1, to_floor)
                self._below(e1, e1, seconds - to_floor)
                short_s = seconds - to_floor
                ledger.unserved_j += deficit_w * short_s
                ledger.unserved_s += short_s
                demand_j = load_w * seconds
                served_fraction = max(0.0, 1.0 - deficit_w * short_s / demand_j) if demand_j > 0 else 0.0
        consumed = ledger.consumed_j
        for name, watts in loads.items():
            consumed[name] = consumed.get(name, 0.0) + watts * seconds * served_fraction
        self.stored_j = e1
        soc1 = e1 / self.capacity_j
        self.soc_min = min(self.soc_min, soc1)

    def draw(self, joules: float, load: str) -> None:
        """An impulse (a sensor sample): ``joules`` taken at once, from the cells
        down to the floor; what the floor refuses goes unserved."""
        if not joules >= 0:
            raise UsageError(f"an impulse draws joules >= 0, not {joules!r}")
        served = min(joules, max(0.0, self.stored_j - self.floor_j))
        self.ledger.unserved_j += joules - served
        self.ledger.consumed_j[load] = self.ledger.consumed_j.get(load, 0.0) + served
        self.stored_j -= served
        soc = self.stored_j / self.capacity_j
        self.soc_min = min(self.soc_min, soc)

    def _below(self, e0: float, e1: float, seconds: float) -> None:
        """Adds the time of a straight segment from e0 to e1 spent below the reserve."""
        r = self.reserve_j
        if seconds <= 0 or (e0 >= r and e1 >= r):
            return
        if e0 < r and e1 < r:
            self.below_reserve_s += seconds
        else:  # crosses once: the part on the low side of the crossing
            self.below_reserve_s += seconds * (r - min(e0, e1)) / abs(e1 - e0)
