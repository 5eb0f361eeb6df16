"""What the terminal draws in each power state.

Four states are enough for the energy budget: asleep (only the controller,
on its real-time clock), listening (receiver and modem on), sending
(transmitter keyed as well), and the sensor's sample, an impulse per
reading.  Every figure is a scenario setting; the defaults are those of a
small VHF data terminal on a 12 V system (common practice, no source: a
microcontroller asleep draws a few milliwatts, a VHF receiver 40 to 60 mA,
a modem's processor idle about 20 mA, and a class-AB/C power amplifier about
half of its supply power into the antenna).
"""

from __future__ import annotations

import dataclasses
import enum
from collections.abc import Mapping

from ionotrail.terminal.errors import UsageError

LOAD_NAMES = ("controller", "receiver", "modem", "transmitter", "sensor")
"""The loads the ledger accounts by name (``energy.consumed_wh`` in a report)."""


class PowerState(enum.Enum):
    ASLEEP = "asleep"
    LISTENING = "listening"
    SENDING = "sending"


@dataclasses.dataclass(frozen=True, slots=True)
class LoadSpec:
    tx_rf_w: float
    """Transmitter power into the antenna, W (the station's)."""
    pa_efficiency: float = 0.5
    controller_w: float = 0.005
    receiver_w: float = 0.6
    modem_w: float = 0.25
    sensor_j: float = 2.0
    """Energy of one sensor sample (sensor warm-up and conversion), J."""

    def __post_init__(self) -> None:
        if not 0 < self.pa_efficiency <= 1:
            raise UsageError(f"PA efficiency {self.pa_efficiency!r} must be above 0 and at most 1")
        for name in ("tx_rf_w", "controller_w", "receiver_w", "modem_w", "sensor_j"):
            value = getattr(self, name)
            if not (isinstance(value, (int, float)) and 0 <= value < 1e5):
                raise UsageError(f"load {name}={value!r} must be a number from 0 to 1e5")

    @property
    def transmitter_w(self) -> float:
        """Supply power while keyed: RF power over PA efficiency."""
        return self.tx_rf_w / self.pa_efficiency

    def loads(self, state: PowerState) -> Mapping[str, float]:
        """Watts by load name in ``state``."""
        return self._table()[state]

    def _table(self) -> dict[PowerState, dict[str, float]]:
        asleep = {"controller": self.controller_w}
        listening = {**asleep, "receiver": self.receiver_w, "modem": self.modem_w}
        return {
            PowerState.ASLEEP: asleep,
            PowerState.LISTENING: listening,
            PowerState.SENDING: {**listening, "transmitter": self.transmitter_w},
        }
