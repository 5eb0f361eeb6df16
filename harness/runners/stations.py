"""Stations on real modems: the reference terminal and the master on serial ports, in real time.

:func:`terminal_station` and :func:`master_station` build what ``ionotrail
serve`` and ``ionotrail master`` run: the same core and shells as the
simulator (:class:`~ionotrail.terminal.service.TerminalService`,
:class:`~ionotrail.harness.emulators.master.MasterStation`), bound to a
:class:`~ionotrail.terminal.ports.serial.SerialPort` and the loop's own clock.
Times in their records are seconds since the station started; messages carry
their creation time as Unix time, so the master measures latency across two
processes whose clocks agree (both read the system clock).
"""

from __future__ import annotations

import asyncio
import dataclasses
import random
import time
from collections.abc import Callable

from ionotrail.harness.channel.scenario import Scenario
from ionotrail.harness.demo.gauge import REPORT_INTERVAL_S, DemoGauge
from ionotrail.harness.emulators.master import DeliveryRecord, MasterStation
from ionotrail.terminal.auth.authenticator import TerminalAuthenticator
from ionotrail.terminal.auth.keys import SiteSecret, TerminalRoot
from ionotrail.terminal.delivery.sender import Sender
from ionotrail.terminal.errors import UsageError
from ionotrail.terminal.limits import DEFAULT_LIMITS, Limits
from ionotrail.terminal.link.policy import Adaptive, by_name
from ionotrail.terminal.link.terminal import Arrival, Duplex, Link
from ionotrail.terminal.modem.dialects import dialect
from ionotrail.terminal.modem.records import Configure
from ionotrail.terminal.outbox.store import Store
from ionotrail.terminal.ports import Port
from ionotrail.terminal.ports.serial import SerialPort
from ionotrail.terminal.service import Observer, TerminalService
from ionotrail.terminal.wire.frames import TAGGED_OVERHEAD_BYTES


def link_limits(scenario: Scenario, limits: Limits = DEFAULT_LIMITS) -> Limits:
    """The limits the scenario's protocol settings fix."""
    return dataclasses.replace(
        limits, turnaround=scenario.turnaround_s, burst_silence=scenario.burst_silence_s, probe_interval=scenario.probe_interval_s
    )


def serial_port(url: str, dialect_name: str, scenario: Scenario, role: str) -> SerialPort:
    """A port for the terminal's or the master's modem, configured from the scenario."""
    up, down = round(scenario.up_mhz * 1e6), round(scenario.down_mhz * 1e6)
    station = scenario.terminal if role == "terminal" else scenario.master
    tx, rx = (up, down) if role == "terminal" else (down, up)
    configure = Configure(tx, rx, round(scenario.bit_rate), station.tx_power_w)
    return SerialPort(url, dialect=dialect(dialect_name), configure=configure, seed=scenario.seed)


def terminal_station(
    port: Port,
    scenario: Scenario,
    *,
    policy: str = "adaptive",
    report_every_s: float = REPORT_INTERVAL_S,
    origin: float,
    observer: Observer | None = None,
    limits: Limits = DEFAULT_LIMITS,
    store: Store | None = None,
    root: TerminalRoot | None = None,
) -> TerminalService:
    """The reference terminal with the demo gauge, on ``port``; ``origin`` is the loop
    time at which it starts (its reports carry Unix creation times)."""
    limits = link_limits(scenario, limits)
    sender = Sender(scenario.terminal_address, scenario.master_address, limits=limits)
    fragment_policy = by_name(policy, scenario.bit_rate, tau_scale=(scenario.down_mhz / scenario.up_mhz) ** 2)
    if scenario.authenticate_data and isinstance(fragment_policy, Adaptive):  # sized for a tagged fragment's overhead
        fragment_policy.overhead_bits = 8 * TAGGED_OVERHEAD_BYTES
    auth = TerminalAuthenticator(root) if root is not None else None
    if scenario.authenticate_data and auth is None:
        raise UsageError("link.authenticate_data needs the terminal's root key (--keys)")
    link = Link(
        sender, fragment_policy, bit_rate=scenario.bit_rate, duplex=Duplex(scenario.duplex), limits=limits, auth=auth,
        authenticate_data=scenario.authenticate_data,
    )  # fmt: skip
    gauge = DemoGauge(
        random.Random(f"gauge-{scenario.seed}"), epoch_unix=time.time() - origin, start=origin, interval_s=report_every_s
    )
    return TerminalService(link, port, gauge, observer=observer, store=store)


def master_station(
    port: Port,
    scenario: Scenario,
    *,
    origin: float,
    sink: Callable[[DeliveryRecord], None] | None = None,
    on_arrival: Callable[[Arrival], None] | None = None,
    store: Store | None = None,
    site: SiteSecret | None = None,
    on_store_trouble: Callable[[str], None] | None = None,
) -> MasterStation:
    """The master on ``port``; ``origin`` is the loop time at which it starts."""
    epoch = time.time() - (asyncio.get_running_loop().time() - origin)  # Unix time at origin
    return MasterStation(
        port,
        scenario.master_address,
        limits=link_limits(scenario),
        epoch_unix=epoch,
        origin=origin,
        sink=sink,
        on_arrival=on_arrival,
        store=store,
        site=site,
        require_data_auth=scenario.authenticate_data,
        on_store_trouble=on_store_trouble,
    )
