"""Link scenarios: a TOML file, every field defaulted, validated, overridable.

A scenario names both stations, the radio parameters of each direction, the
noise environment, the period to simulate and the seed.  Unknown keys are
errors, not ignored; every error names the key, the value and what was
expected.  ``--set dotted.key=value`` overrides apply the same validation.
docs/scenario.md documents the schema (its table is generated from
:data:`SCHEMA`).
"""

from __future__ import annotations

import dataclasses
import datetime as dt
import math
import tomllib
from collections.abc import Callable, Iterable
from importlib import resources
from pathlib import Path
from typing import Any

from ionotrail.harness.demo.gauge import REPORT_HEADER
from ionotrail.terminal.limits import MAX_FRAME_BYTES
from ionotrail.terminal.power.battery import CHEMISTRIES
from ionotrail.terminal.power.scheduler import POLICIES, SchedulerSettings

HYSTERESIS_SOC = SchedulerSettings().hysteresis
"""The scheduler's hysteresis (state of charge) between its reserve and conserve thresholds."""


class ScenarioError(ValueError):
    """A scenario file or override that cannot be used; the message says why."""


ENVIRONMENTS = ("business", "residential", "rural", "quiet_rural")
MODULATIONS = ("bpsk", "dpsk", "coherent_fsk", "noncoherent_fsk")
POLARISATIONS = ("horizontal", "vertical")
END_UNIX_S = 2 ** (8 * REPORT_HEADER.created_s.sizeof())
"""The first instant a message creation time cannot carry: creation times are
unsigned whole seconds since 1970-01-01 UTC in 32 bits (the demo report's
``created_s``), so a run must start at or after 1970 and end before
2106-02-07T06:28:16Z."""
_CARRIED = "(message creation times are 32-bit seconds since 1970)"


@dataclasses.dataclass(frozen=True)
class Field:
    default: Any
    doc: str
    check: Callable[[Any], str | None]
    """Returns what is expected when the value is unacceptable, else None."""


def _number(low: float, high: float, unit: str = "") -> Callable[[Any], str | None]:
    def check(value: Any) -> str | None:
        ok = (
            isinstance(value, (int, float))
            and not isinstance(value, bool)
            and (isinstance(value, int) or math.isfinite(value))  # an int is finite, and may be too large for a float
        )
        if ok and low <= value <= high:
            return None
        return f"a number from {low:g} to {high:g}{(' ' + unit) if unit else ''}"

    return check


def _integer(low: int, high: int) -> Callable[[Any], str | None]:
    def check(value: Any) -> str | None:
        if isinstance(value, int) and not isinstance(value, bool) and low <= value <= high:
            return None
        return f"a whole number from {low} to {high}"

    return check


def _choice(options: Iterable[str]) -> Callable[[Any], str | None]:
    options = tuple(options)
    return lambda value: None if value in options else f"one of {', '.join(options)}"


def _text(value: Any) -> str | None:
    return None if isinstance(value, str) and 0 < len(value) <= 80 else "a name of 1 to 80 characters"


def _hourly_rates(value: Any) -> str | None:
    ok = isinstance(value, list) and (
        not value or (len(value) == 24 and all(isinstance(v, (int, float)) and not isinstance(v, bool) and 0 < v < 1e6 for v in value))
    )
    return None if ok else "an empty list, or 24 positive openings per hour (UTC hour 0 first)"


def _flag(value: Any) -> str | None:
    return None if isinstance(value, bool) else "true or false"


def _utc_text(unix_s: float) -> str:
    return dt.datetime.fromtimestamp(unix_s, dt.UTC).strftime("%Y-%m-%dT%H:%M:%SZ")


def _instant(value: Any) -> str | None:
    parsed = _parse_instant(value) if isinstance(value, (dt.datetime, str)) else None
    if parsed is None:
        return "a UTC date and time such as 2027-01-15T00:00:00Z"
    if not 0 <= parsed.timestamp() < END_UNIX_S:
        return f"a UTC date and time from {_utc_text(0)} to {_utc_text(END_UNIX_S - 1)} {_CARRIED}"
    return None


def _parse_instant(value: Any) -> dt.datetime | None:
    """The instant, time-zone aware (UTC when none is given); None when it is not one.
    It may lie outside what datetime can convert to UTC: compare timestamps."""
    if isinstance(value, dt.datetime):
        return value if value.tzinfo else value.replace(tzinfo=dt.UTC)
    try:
        parsed = dt.datetime.fromisoformat(str(value))
    except ValueError:
        return None
    return parsed if parsed.tzinfo else parsed.replace(tzinfo=dt.UTC)


def _station(name: str, lat: float, lon: float, power: float) -> dict[str, Field]:
    return {
        "name": Field(name, "station name", _text),
        "lat_deg": Field(lat, "latitude, degrees north", _number(-90, 90, "degrees")),
        "lon_deg": Field(lon, "longitude, degrees east", _number(-180, 180, "degrees")),
        "height_m": Field(300.0, "antenna height above sea level, m", _number(-100, 6000, "m")),
        "gain_dbi": Field(7.0, "antenna gain towards the path, dBi (a 3-element Yagi is about 7)", _number(-10, 25, "dBi")),
        "polarisation": Field("horizontal", "antenna polarisation", _choice(POLARISATIONS)),
        "tx_power_w": Field(power, "transmitter power into the antenna, W", _number(0.1, 10000, "W")),
        "noise_figure_db": Field(4.0, "receiver noise figure, dB", _number(0, 20, "dB")),
        "environment": Field("rural", "man-made noise category of the site (ITU-R P.372)", _choice(ENVIRONMENTS)),
    }


# The demo link: invented stations on an invented 982 km path.
SCHEMA: dict[str, dict[str, Field]] = {
    "scenario": {
        "name": Field("Haldane Creek to Kestrel Ridge (demo)", "scenario name, shown in reports", _text),
        "start": Field("2027-03-15T00:00:00Z", "start of the simulated period, UTC", _instant),
        "duration_hours": Field(24.0, "length of the simulated period, hours", _number(0.01, 24 * 366, "hours")),
        "seed": Field(1, "seed of every random draw; a run replays exactly from it", _integer(0, 2**63 - 1)),
    },
    "terminal": _station("Haldane Creek gauge", 61.20, 14.10, 300.0),
    "master": _station("Kestrel Ridge master", 55.60, 27.20, 500.0),
    "link": {
        "up_mhz": Field(40.52, "terminal-to-master carrier frequency, MHz", _number(20, 200, "MHz")),
        "down_mhz": Field(41.61, "master-to-terminal carrier frequency, MHz", _number(20, 200, "MHz")),
        "modulation": Field("bpsk", "modulation, for the bit-error formula", _choice(MODULATIONS)),
        "bit_rate": Field(4800.0, "bit rate on the air, bit/s", _number(100, 1e6, "bit/s")),
        "threshold_ber": Field(1e-5, "bit-error rate at which the path counts as open", _number(1e-9, 0.1)),
        "oscillator_ppm": Field(2.0, "oscillator offset between the stations, parts per million", _number(0, 100, "ppm")),
        "authenticate_data": Field(False, "send every uplink fragment tagged (key epoch, counter, tag: 14 bytes more each; docs/keys.md); the master then refuses plain ones", _flag),
    },
    "channel": {
        "reflection_height_km": Field(95.0, "mean height of the reflecting trails, km", _number(80, 115, "km")),
        "mass_index": Field(2.0, "mass index s of sporadic meteors (ITU-R P.843: about 2)", _number(1.5, 3.0)),
        "sporadic_scale": Field(1.0, "multiplier on the sporadic rate (site and year variation)", _number(0.01, 100)),
        "showers": Field(True, "include the major annual showers", _flag),
    },
    "protocol": {
        "terminal_address": Field(2609, "the terminal's 16-bit address", _integer(0, 0xFFFF)),
        "master_address": Field(7, "the master's 8-bit address", _integer(0, 0xFF)),
        "probe_interval_s": Field(0.1, "seconds between the starts of the master's probes", _number(0.02, 10, "s")),
        "duplex": Field("full", "full: the terminal hears probes while it sends (two frequencies); half: it cannot", _choice(("full", "half"))),
        "turnaround_s": Field(0.010, "terminal's receive-to-transmit switching time", _number(0, 1, "s")),
        "burst_silence_s": Field(0.25, "the terminal ends a burst after this long without a probe", _number(0.01, 60, "s")),
    },
    "power": {
        "policy": Field("adaptive", "listening policy: always-on, fixed-duty (baselines) or adaptive", _choice(POLICIES)),
        "listen_duty": Field(0.25, "fixed-duty: fraction of each duty period the receiver listens", _number(0.001, 1)),
        "duty_period_s": Field(3600.0, "fixed-duty: the period of the listening schedule, s", _number(60, 86400, "s")),
        "alarm_deadline_s": Field(900.0, "an alarm delivered later than this after its creation missed its deadline, s", _number(1, 30 * 86400, "s")),
        "routine_deadline_s": Field(14400.0, "the same for a routine report, s", _number(1, 30 * 86400, "s")),
        "batch": Field(4, "adaptive: routine messages worth opening the receiver for in a good hour", _integer(1, 1000)),
        "conserve_batch": Field(12, "routine messages sent together while the battery is conserving", _integer(1, 1000)),
        "tx_duty_limit": Field(0.25, "most of any sliding window the transmitter may be keyed (a thermal or regulatory limit; 1: none)", _number(0.001, 1)),
        "tx_duty_window_s": Field(60.0, "the sliding window of tx_duty_limit, s", _number(1, 86400, "s")),
        "uplink_backoff": Field(True, "stop transmitting on probes weaker than those whose frames went unacknowledged", _flag),
        "burst_rate_prior": Field([], "openings per hour by UTC hour, e.g. bursts_per_hour of `ionotrail channel --json` (empty: a flat 30 per hour); then learned", _hourly_rates),
    },
    "battery": {
        "chemistry": Field("lead-acid", "cell chemistry: its floor, charge efficiency and cold-charging rule", _choice(CHEMISTRIES)),
        "capacity_wh": Field(480.0, "nominal capacity, Wh (12 V 40 Ah)", _number(1, 1e5, "Wh")),
        "initial_soc": Field(0.9, "state of charge at the start", _number(0, 1)),
        "reserve": Field(0.25, "fraction of the usable window (floor to full) kept for alarms", _number(0, 0.9)),
        "conserve": Field(0.5, "fraction of the usable window below which routine traffic is deferred and batched", _number(0.05, 0.95)),
    },
    "solar": {
        "panel_w": Field(20.0, "panel peak power at 1000 W/m2, W", _number(0, 10000, "W")),
        "tilt_deg": Field(60.0, "panel tilt from horizontal, degrees", _number(0, 90, "degrees")),
        "azimuth_deg": Field(180.0, "direction the panel faces, degrees clockwise from north", _number(0, 360, "degrees")),
        "albedo": Field(0.2, "ground reflectance (snow: 0.6 to 0.9)", _number(0, 1)),
        "system_efficiency": Field(0.8, "panel to battery terminals: wiring, controller, soiling, heat (common practice, no source)", _number(0.05, 1)),
        "clearness_mean": Field(0.55, "mean of the daily cloudiness factor on the clear-sky harvest (1: always clear)", _number(0.01, 1)),
    },
    "climate": {
        "temp_mean_c": Field(2.0, "mean air temperature at the battery, deg C", _number(-60, 50, "deg C")),
        "temp_seasonal_c": Field(12.0, "half the swing between the warmest and coldest day, deg C", _number(0, 50, "deg C")),
        "temp_daily_c": Field(4.0, "half the swing between afternoon and dawn, deg C", _number(0, 30, "deg C")),
        "warmest_day": Field(200, "day of the year of the warmest days (200 is mid-July)", _integer(1, 366)),
    },
    "loads": {
        "controller_w": Field(0.005, "controller asleep, W", _number(0, 100, "W")),
        "receiver_w": Field(0.6, "receiver listening, W", _number(0, 100, "W")),
        "modem_w": Field(0.25, "modem powered and idle (with the receiver), W", _number(0, 100, "W")),
        "pa_efficiency": Field(0.5, "transmitter supply power is RF power over this", _number(0.05, 1)),
        "sensor_j": Field(2.0, "energy of one sensor sample (each message created), J", _number(0, 10000, "J")),
    },
}
ENERGY_SECTIONS = ("power", "battery", "solar", "climate", "loads")
PROTOCOL_ONLY = ("power.policy=always-on", "power.uplink_backoff=false", "power.tx_duty_limit=1")
"""Overrides that leave the protocol alone on the air: the receiver always on,
no uplink gate, no transmit duty-cycle limit (the protocol's own tests use them;
the energy is still accounted)."""


@dataclasses.dataclass(frozen=True)
class Station:
    name: str
    lat_deg: float
    lon_deg: float
    height_m: float
    gain_dbi: float
    polarisation: str
    tx_power_w: float
    noise_figure_db: float
    environment: str


@dataclasses.dataclass(frozen=True)
class Energy:
    """The terminal's power settings (sections power, battery, solar, climate, loads)."""

    policy: str
    listen_duty: float
    duty_period_s: float
    alarm_deadline_s: float
    routine_deadline_s: float
    batch: int
    conserve_batch: int
    tx_duty_limit: float
    tx_duty_window_s: float
    uplink_backoff: bool
    burst_rate_prior: tuple[float, ...]
    chemistry: str
    capacity_wh: float
    initial_soc: float
    reserve: float
    conserve: float
    panel_w: float
    tilt_deg: float
    azimuth_deg: float
    albedo: float
    system_efficiency: float
    clearness_mean: float
    temp_mean_c: float
    temp_seasonal_c: float
    temp_daily_c: float
    warmest_day: int
    controller_w: float
    receiver_w: float
    modem_w: float
    pa_efficiency: float
    sensor_j: float


def _energy(m: dict[str, dict[str, Any]]) -> Energy:
    values = {k: m[section][k] for section in ENERGY_SECTIONS for k in SCHEMA[section]}
    values["burst_rate_prior"] = tuple(float(v) for v in values["burst_rate_prior"])
    return Energy(**values)


def default_energy() -> Energy:
    return _energy({section: {k: f.default for k, f in fields.items()} for section, fields in SCHEMA.items()})


@dataclasses.dataclass(frozen=True)
class Scenario:
    """A validated link scenario."""

    name: str
    start: dt.datetime
    duration_hours: float
    seed: int
    terminal: Station
    master: Station
    up_mhz: float
    down_mhz: float
    modulation: str
    bit_rate: float
    threshold_ber: float
    oscillator_ppm: float
    reflection_height_km: float
    mass_index: float
    sporadic_scale: float
    showers: bool
    authenticate_data: bool = False
    terminal_address: int = 2609
    master_address: int = 7
    probe_interval_s: float = 0.1
    duplex: str = "full"
    turnaround_s: float = 0.010
    burst_silence_s: float = 0.25
    source: str = "built-in demo"
    energy: Energy = dataclasses.field(default_factory=default_energy)

    @property
    def duration_s(self) -> float:
        return self.duration_hours * 3600.0


def _merge(values: dict[str, Any], origin: str) -> dict[str, dict[str, Any]]:
    """Defaults overlaid with ``values``, refusing unknown keys and bad values."""
    merged = {section: {k: f.default for k, f in fields.items()} for section, fields in SCHEMA.items()}
    for section, table in values.items():
        if section not in SCHEMA:
            raise ScenarioError(f"{origin}: unknown section [{section}]; expected one of {', '.join(SCHEMA)}")
        if not isinstance(table, dict):
            raise ScenarioError(f"{origin}: [{section}] must be a table of keys")
        for key, value in table.items():
            _check(section, key, value, origin)
            merged[section][key] = value
    return merged


def _check(section: str, key: str, value: Any, origin: str) -> None:
    fields = SCHEMA[section]
    if key not in fields:
        raise ScenarioError(f"{origin}: unknown key {section}.{key}; [{section}] takes {', '.join(fields)}")
    expected = fields[key].check(value)
    if expected is not None:
        try:
            shown = value.isoformat() if isinstance(value, dt.datetime) else repr(value)
        except ValueError:  # an integer past Python's 4300 decimal digits (TOML reads hexadecimal ones of any length)
            shown = "a number too long to show"
        raise ScenarioError(f"{origin}: {section}.{key} = {shown} is not usable; expected {expected}")


def parse_override(text: str) -> tuple[str, str, Any]:
    """``section.key=value`` from the command line; the value is read as TOML,
    or taken as text when it is not valid TOML (so names need no quotes)."""
    if "=" not in text or "." not in text.split("=", 1)[0]:
        raise ScenarioError(f"--set {text!r}: expected section.key=value, e.g. link.bit_rate=9600")
    path, raw = text.split("=", 1)
    section, key = path.strip().split(".", 1)
    try:
        value = tomllib.loads(f"v = {raw.strip()}")["v"]
    except (ValueError, RecursionError):  # not TOML, an integer past Python's 4300 digits, or nested too deeply
        value = raw.strip()
    if section in SCHEMA and key in SCHEMA[section]:
        wanted = SCHEMA[section][key].default
        if isinstance(wanted, float) and isinstance(value, int) and not isinstance(value, bool):
            try:
                value = float(value)
            except OverflowError:  # beyond any float: left whole, for the check to refuse
                pass
    return section, key, value


def load(path: str | Path | None = None, overrides: Iterable[str] = (), options: Iterable[tuple[str, str, Any]] = ()) -> Scenario:
    """The scenario in ``path`` (the built-in demo when None), with overrides.

    ``options`` are command-line shorthands for a key, as (the option as the
    user gave it, dotted key, value), e.g. ``("--days 2", "scenario.duration_hours", 48.0)``:
    applied after the overrides, with the same checks, and an error names the option.
    """
    if path is None:
        text, origin = resources.files("ionotrail.harness.demo").joinpath("link.toml").read_text(encoding="utf-8"), "built-in demo"
    else:
        origin = str(path)
        try:
            text = Path(path).read_text(encoding="utf-8")
        except (OSError, UnicodeDecodeError) as exc:
            raise ScenarioError(f"{origin}: cannot read: {getattr(exc, 'strerror', None) or exc}") from None
    try:
        values = tomllib.loads(text)
    except ValueError as exc:  # TOMLDecodeError, or an integer longer than Python converts (4300 digits)
        raise ScenarioError(f"{origin}: not valid TOML: {exc}") from None
    except RecursionError:
        raise ScenarioError(f"{origin}: not usable TOML: arrays or tables nested too deeply") from None
    merged = _merge(values, origin)
    given: dict[str, str] = {}  # dotted key -> the override that set it
    for text_override in overrides:
        section, key, value = parse_override(text_override)
        if section not in SCHEMA:
            raise ScenarioError(f"--set {text_override}: unknown section [{section}]; expected one of {', '.join(SCHEMA)}")
        _check(section, key, value, f"--set {text_override}")
        merged[section][key] = value
        given[f"{section}.{key}"] = f"--set {text_override}"
    for option, dotted, value in options:
        section, key = dotted.split(".", 1)
        _check(section, key, value, option)
        merged[section][key] = value
        given[dotted] = option
    return _build(merged, origin, given)


def _build(m: dict[str, dict[str, Any]], origin: str, given: dict[str, str] | None = None) -> Scenario:
    """The scenario from merged values; ``given`` names the override behind a
    key, for errors that involve more than one key."""
    given = given or {}
    p = m["protocol"]
    if not p["burst_silence_s"] > max(p["probe_interval_s"], p["turnaround_s"]):
        raise ScenarioError(
            f"{origin}: protocol.burst_silence_s = {p['burst_silence_s']!r} must be longer than protocol.probe_interval_s "
            f"({p['probe_interval_s']!r}) and protocol.turnaround_s ({p['turnaround_s']!r}), or every burst ends between two probes"
        )
    start = _parse_instant(m["scenario"]["start"])
    assert start is not None
    end = start.timestamp() + float(m["scenario"]["duration_hours"]) * 3600.0
    if not end < END_UNIX_S:
        where = " and ".join(dict.fromkeys(given.get(k, origin) for k in ("scenario.start", "scenario.duration_hours")))
        raise ScenarioError(
            f"{where}: scenario.start = {_utc_text(start.timestamp())} and scenario.duration_hours = {m['scenario']['duration_hours']!r} "
            f"end the run at {_utc_text(end)}, which is not usable; expected a run that ends before {_utc_text(END_UNIX_S)} {_CARRIED}"
        )
    stations = {name: Station(**{k: m[name][k] for k in SCHEMA[name]}) for name in ("terminal", "master")}
    b = m["battery"]
    if not b["reserve"] < b["conserve"]:
        where = " and ".join(dict.fromkeys(given.get(k, origin) for k in ("battery.reserve", "battery.conserve")))
        raise ScenarioError(f"{where}: battery.reserve = {b['reserve']!r} must be below battery.conserve = {b['conserve']!r}")
    floor = CHEMISTRIES[b["chemistry"]].soc_floor
    if not b["initial_soc"] >= floor:
        where = " and ".join(dict.fromkeys(given.get(k, origin) for k in ("battery.initial_soc", "battery.chemistry")))
        raise ScenarioError(f"{where}: battery.initial_soc = {b['initial_soc']!r} is below the {b['chemistry']} floor {floor}")
    pw = m["power"]
    longest_s = 8 * MAX_FRAME_BYTES / float(m["link"]["bit_rate"])
    if pw["tx_duty_limit"] < 1 and pw["tx_duty_limit"] * pw["tx_duty_window_s"] < longest_s:
        where = " and ".join(dict.fromkeys(given.get(k, origin) for k in ("power.tx_duty_limit", "power.tx_duty_window_s", "link.bit_rate")))
        raise ScenarioError(
            f"{where}: power.tx_duty_limit = {pw['tx_duty_limit']!r} of power.tx_duty_window_s = {pw['tx_duty_window_s']!r} s"
            f" is {pw['tx_duty_limit'] * pw['tx_duty_window_s']:.3f} s of airtime, less than one {MAX_FRAME_BYTES}-byte frame"
            f" ({longest_s:.3f} s at link.bit_rate = {m['link']['bit_rate']!r}): the terminal could never transmit"
        )
    gap = (b["conserve"] - b["reserve"]) * (1 - floor)
    if gap < HYSTERESIS_SOC:
        where = " and ".join(dict.fromkeys(given.get(k, origin) for k in ("battery.reserve", "battery.conserve")))
        raise ScenarioError(
            f"{where}: battery.reserve = {b['reserve']!r} and battery.conserve = {b['conserve']!r} are {gap:.3f} of charge apart"
            f" on {b['chemistry']}; they must be at least {HYSTERESIS_SOC} apart (the levels' hysteresis)"
        )
    if not m["power"]["batch"] <= m["power"]["conserve_batch"]:
        raise ScenarioError(f"{origin}: power.batch = {m['power']['batch']!r} must be at most power.conserve_batch = {m['power']['conserve_batch']!r}")
    return Scenario(
        name=m["scenario"]["name"],
        start=start.astimezone(dt.UTC),
        duration_hours=float(m["scenario"]["duration_hours"]),
        seed=int(m["scenario"]["seed"]),
        terminal=stations["terminal"],
        master=stations["master"],
        source=origin,
        **{k: m["link"][k] for k in SCHEMA["link"]},
        **{k: m["channel"][k] for k in SCHEMA["channel"]},
        **{k: m["protocol"][k] for k in SCHEMA["protocol"]},
        energy=_energy(m),
    )


def schema_table() -> str:
    """Markdown table of every key, its default and meaning (for docs/scenario.md)."""
    lines = ["| key | default | meaning |", "| --- | --- | --- |"]
    for section, fields in SCHEMA.items():
        for key, f in fields.items():
            default = f"`{f.default!r}`" if not isinstance(f.default, bool) else f"`{str(f.default).lower()}`"
            lines.append(f"| `{section}.{key}` | {default} | {f.doc} |")
    return "\n".join(lines) + "\n"
