"""Scenario files: defaults, overrides and the errors a user sees."""

from __future__ import annotations

import json
import re
import subprocess
import sys
from pathlib import Path

import pytest
from ionotrail.harness.channel import scenario
from ionotrail.harness.channel.scenario import ScenarioError


def test_builtin_demo_matches_the_schema_defaults() -> None:
    demo = scenario.load(None)
    assert demo.terminal.name == "Haldane Creek gauge" and demo.master.name == "Kestrel Ridge master"
    assert demo.duration_hours == 24.0 and demo.seed == 1
    assert demo == scenario._build(scenario._merge({}, "defaults"), "built-in demo")


def test_every_key_is_optional(tmp_path: Path) -> None:
    path = tmp_path / "link.toml"
    path.write_text("[terminal]\nlat_deg = 60.0\n")
    loaded = scenario.load(path)
    assert loaded.terminal.lat_deg == 60.0 and loaded.master.lat_deg == scenario.load(None).master.lat_deg


@pytest.mark.parametrize(
    ("text", "message"),
    [
        ("[terminal]\nlatitude = 60.0\n", "unknown key terminal.latitude; [terminal] takes name, lat_deg"),
        ("[radio]\nx = 1\n", "unknown section [radio]"),
        ("[terminal]\nlat_deg = 95.0\n", "terminal.lat_deg = 95.0 is not usable; expected a number from -90 to 90 degrees"),
        ("[link]\nmodulation = \"qam\"\n", "expected one of bpsk, dpsk, coherent_fsk, noncoherent_fsk"),
        ("[terminal]\nlat_deg = \"sixty\"\n", "terminal.lat_deg = 'sixty' is not usable"),
        ("[scenario]\nstart = \"yesterday\"\n", "expected a UTC date and time"),
        ("[link\n", "not valid TOML"),
    ],
)
def test_bad_file_gets_one_clear_error(tmp_path: Path, text: str, message: str) -> None:
    path = tmp_path / "bad.toml"
    path.write_text(text)
    with pytest.raises(ScenarioError, match=message.replace("[", r"\[").replace("(", r"\(")) as info:
        scenario.load(path)
    assert str(path) in str(info.value)


def test_overrides_use_the_same_validation() -> None:
    assert scenario.load(None, ["link.bit_rate=9600"]).bit_rate == 9600.0
    assert scenario.load(None, ["terminal.name=Upper Weir"]).terminal.name == "Upper Weir"
    assert scenario.load(None, ["channel.showers=false"]).showers is False
    with pytest.raises(ScenarioError, match=re.escape("--set link.bit_rate=fast: link.bit_rate = 'fast' is not usable")):
        scenario.load(None, ["link.bit_rate=fast"])
    with pytest.raises(ScenarioError, match=re.escape("expected section.key=value")):
        scenario.load(None, ["bit_rate=9600"])
    with pytest.raises(ScenarioError, match=re.escape("unknown key link.rate")):
        scenario.load(None, ["link.rate=9600"])


def test_missing_file_is_named(tmp_path: Path) -> None:
    with pytest.raises(ScenarioError, match="cannot read"):
        scenario.load(tmp_path / "absent.toml")


def _run(*args: str) -> subprocess.CompletedProcess[str]:
    return subprocess.run([sys.executable, "-m", "ionotrail.harness.cli.main", *args], capture_output=True, text=True, timeout=300, check=False)


def test_channel_command_json_keys_and_trails_file(tmp_path: Path) -> None:
    trails_path = tmp_path / "trails.jsonl"
    plot_path = tmp_path / "forecast.png"
    result = _run("channel", "--hours", "6", "--json", "--trails", str(trails_path), "--plot", str(plot_path))
    assert result.returncode == 0, result.stderr
    report = json.loads(result.stdout)
    g = report["geometry"]
    assert g["endpoints"] == [[61.2, 14.1], [55.6, 27.2]]
    for key in ("distance_km", "half_angle_deg", "elevation_deg"):
        assert g[key] > 0
    assert len(report["hourly"]) == 6
    for row in report["hourly"]:
        assert set(row) >= {"hour", "bursts_per_hour", "mean_open_s", "duty_cycle", "capacity_bits_per_hour", "wait_100B_s"}
    records = [json.loads(line) for line in trails_path.read_text().splitlines()]
    assert len(records) == report["trails"]["generated"]
    first = records[0]
    assert set(first) == {"t_s", "kind", "height_km", "q", "up", "down"}
    assert set(first["up"]) == {"peak_snr_db", "tau_s", "open_s", "doppler_hz"}
    # The forecast is computed from the same trails the file holds.
    both = sum(1 for r in records if min(r["up"]["open_s"], r["down"]["open_s"]) > 0)
    assert both == report["trails"]["usable"]
    assert sum(row["bursts_per_hour"] for row in report["hourly"]) == pytest.approx(both)
    assert plot_path.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"


def test_channel_command_refuses_a_bad_override_in_one_line() -> None:
    result = _run("channel", "--set", "terminal.lat_deg=95")
    assert result.returncode == 2
    assert result.stderr.strip().count("\n") == 0 and "expected a number from -90 to 90" in result.stderr


def test_channel_command_refuses_a_path_beyond_one_hop() -> None:
    result = _run("channel", "--set", "master.lat_deg=30.0", "--set", "master.lon_deg=40.0")
    assert result.returncode == 2 and "single-hop limit" in result.stderr


def test_short_path_warns_but_runs() -> None:
    result = _run("channel", "--hours", "1", "--set", "master.lat_deg=60.0", "--set", "master.lon_deg=18.0")
    assert result.returncode == 0 and "warning" in result.stderr


def test_channel_by_month_rows_cover_the_period() -> None:
    result = _run("channel", "--json", "--by-month", "--set", "scenario.start=2027-01-30T00:00:00Z", "--days", "4")
    assert result.returncode == 0, result.stderr
    months = json.loads(result.stdout)["monthly"]
    assert [m["month"] for m in months] == ["2027-01", "2027-02"]
    assert all(m["bursts_per_hour"] > 0 for m in months)


# Message creation times are 32-bit unsigned whole seconds since 1970-01-01 UTC
# (the demo report's created_s, harness/demo/gauge.py), so the last instant one
# can carry is 2**32 - 1 s = 2106-02-07T06:28:15Z (Python: datetime.fromtimestamp(2**32 - 1, UTC)).
@pytest.mark.parametrize(
    "start",
    [
        "1969-12-31T23:59:59Z",  # one second before the epoch
        "1960-01-01T00:00:00Z",
        "2106-02-07T06:28:16Z",  # one second past the last representable one
        "2107-01-01T00:00:00Z",
        "9999-12-31T23:00:00Z",
        "0001-01-01T00:00:00+01:00",  # in UTC, before Python's datetime range: astimezone overflowed
    ],
)
def test_a_start_the_stack_cannot_carry_is_refused(start: str) -> None:
    with pytest.raises(ScenarioError) as info:
        scenario.load(None, [f"scenario.start={start}"])
    message = str(info.value)
    assert message.startswith(f"--set scenario.start={start}: scenario.start = ")
    assert "is not usable; expected a UTC date and time from 1970-01-01T00:00:00Z to 2106-02-07T06:28:15Z" in message


def test_a_start_from_a_file_as_a_toml_datetime_is_refused(tmp_path: Path) -> None:
    path = tmp_path / "old.toml"
    path.write_text("[scenario]\nstart = 0001-01-01T00:00:00+01:00\n")  # a TOML offset date-time, not a string
    with pytest.raises(ScenarioError, match=re.escape(f"{path}: scenario.start = 0001-01-01T00:00:00+01:00 is not usable")):
        scenario.load(path)


def test_the_first_and_last_representable_instants_are_accepted() -> None:
    assert scenario.load(None, ["scenario.start=1970-01-01T00:00:00Z"]).start.timestamp() == 0
    last = scenario.load(None, ["scenario.start=2106-02-07T06:27:15Z", "scenario.duration_hours=0.01"])
    assert last.start.timestamp() + last.duration_s < 2**32


def test_a_run_that_ends_past_the_last_representable_instant_is_refused() -> None:
    start = "--set scenario.start=2106-02-07T00:00:00Z"
    with pytest.raises(ScenarioError) as info:
        scenario.load(None, [start.removeprefix("--set "), "scenario.duration_hours=24"])
    message = str(info.value)
    assert message.startswith(f"{start} and --set scenario.duration_hours=24: scenario.start = 2106-02-07T00:00:00Z and ")
    assert "scenario.duration_hours = 24.0 end the run at 2106-02-08T00:00:00Z" in message
    assert "expected a run that ends before 2106-02-07T06:28:16Z" in message


@pytest.mark.parametrize("command", ["simulate", "channel"])
@pytest.mark.parametrize("start", ["1960-01-01T00:00:00Z", "2107-01-01T00:00:00Z", "0001-01-01T00:00:00+01:00"])
def test_commands_refuse_an_unrepresentable_start_in_one_line(command: str, start: str) -> None:
    result = _run(command, "--hours", "0.5", "--set", f"scenario.start={start}")
    assert result.returncode == 2, result.stderr
    assert result.stdout == "" and "Traceback" not in result.stderr
    lines = result.stderr.strip().splitlines()
    assert len(lines) == 1 and f"scenario.start={start}" in lines[0] and "1970-01-01T00:00:00Z to 2106-02-07T06:28:15Z" in lines[0]


def test_the_demo_file_states_every_default() -> None:
    # harness/demo/link.toml says its values are the defaults: every key of the
    # schema is in it, with the schema's default.
    import tomllib
    from importlib import resources

    text = resources.files("ionotrail.harness.demo").joinpath("link.toml").read_text(encoding="utf-8")
    values = tomllib.loads(text)
    for section, fields in scenario.SCHEMA.items():
        for key, field in fields.items():
            assert values[section][key] == field.default, f"{section}.{key}"


@pytest.mark.parametrize(
    ("overrides", "expected"),
    [
        (["power.tx_duty_limit=0.005"], "less than one 266-byte frame"),
        (["battery.conserve=0.3"], "must be at least 0.03 apart"),
        (["battery.reserve=0.6", "battery.conserve=0.5"], "must be below battery.conserve"),
        (["battery.chemistry=lead-acid", "battery.initial_soc=0.3"], "below the lead-acid floor"),
        (["power.batch=20"], "must be at most power.conserve_batch"),
    ],
)
def test_power_settings_that_cannot_work_are_refused_naming_the_override(overrides: list[str], expected: str) -> None:
    with pytest.raises(ScenarioError, match=expected) as caught:
        scenario.load(None, overrides)
    assert "\n" not in str(caught.value)
