"""Link forecast from a generated trail set: geometry and hour-by-hour figures.

A *burst* here is a trail open in both directions (the terminal must hear a
probe and the master must hear the reply); its open time is the shorter of
the two.  The capacity bound counts the uplink alone: a genie that knew
every opening would need no probe.
"""

from __future__ import annotations

import json
import math
from collections.abc import Iterator
from typing import Any, TextIO

import numpy as np
from ionotrail.harness.channel import sky
from ionotrail.harness.channel.model import DIRECTIONS, TrailSet, exclusive_open
from ionotrail.terminal.limits import FRAGMENT_OVERHEAD_BYTES, MESSAGE_CRC_BYTES

PROBE_MESSAGE_BYTES = 100
"""The forecast's waiting time is for one 100-byte message in one fragment."""


def message_airtime_s(payload: int, bit_rate: float) -> float:
    """Seconds on the air for one fragment carrying a whole sealed message."""
    return (payload + MESSAGE_CRC_BYTES + FRAGMENT_OVERHEAD_BYTES) * 8 / bit_rate


def forecast(trails: TrailSet) -> dict[str, Any]:
    s = trails.scenario
    g = trails.geometry
    data = trails.trails
    days = s.duration_s / 86400.0
    rate = s.bit_rate
    airtime = message_airtime_s(PROBE_MESSAGE_BYTES, rate)
    report: dict[str, Any] = {
        "scenario": s.name,
        "seed": s.seed,
        "period": {"start": s.start.isoformat().replace("+00:00", "Z"), "hours": s.duration_hours},
        "geometry": {
            "endpoints": [[s.terminal.lat_deg, s.terminal.lon_deg], [s.master.lat_deg, s.master.lon_deg]],
            "distance_km": g.distance_km,
            "half_angle_deg": g.half_angle_deg,
            "elevation_deg": g.elevation_deg,
            "midpoint": list(g.midpoint),
            "reflection_height_km": g.height_km,
        },
        "link": {
            "bit_rate": rate,
            "modulation": s.modulation,
            "threshold_ebn0_db": {d: 10 * math.log10(p.ebn0_threshold) for d, p in trails.directions.items()},
            "message_airtime_s": airtime,
        },
        "trails": {"generated": trails.generated, "usable": 0},
        "hourly": [],
    }
    if data is None or not len(data):
        return report
    both = np.minimum(data.open_s["up"], data.open_s["down"])
    usable = both > 0
    covered = exclusive_open(data.t, both)  # overlapping trails counted once
    uplink = exclusive_open(data.t, data.open_s["up"])
    report["trails"]["usable"] = int(np.count_nonzero(usable))
    hour = np.floor(np.mod((trails.start_unix + data.t) / 3600.0, 24.0)).astype(int)
    lon = g.midpoint[1]
    for h in range(24):
        in_hour = hour == h
        opened = both[in_hour & usable]
        hours_observed = _hours_in(trails, h)
        if hours_observed == 0:
            continue
        long_enough = int(np.count_nonzero(opened >= airtime))
        report["hourly"].append(
            {
                "hour": h,
                "local_solar_hour": float(np.mod(h + 0.5 + lon / 15.0, 24.0)),
                "bursts_per_hour": len(opened) / hours_observed,
                "mean_open_s": float(opened.mean()) if len(opened) else 0.0,
                "median_open_s": float(np.median(opened)) if len(opened) else 0.0,
                "duty_cycle": float(covered[in_hour].sum()) / (3600.0 * hours_observed),
                "capacity_bits_per_hour": float(uplink[in_hour].sum()) * rate / hours_observed,
                "wait_100B_s": (3600.0 * hours_observed / long_enough) if long_enough else None,
            }
        )
    report["totals"] = {
        "bursts_per_hour": float(np.count_nonzero(usable)) / (days * 24),
        "duty_cycle": float(covered.sum()) / s.duration_s,
        "capacity_bits": trails.capacity_bits("up"),
        "capacity_bits_per_hour": trails.capacity_bits("up") / (days * 24),
    }
    return report


def _hours_in(trails: TrailSet, hour: int) -> float:
    """How many hours of the period fall in UTC hour-of-day ``hour``."""
    start = trails.start_unix
    end = start + trails.scenario.duration_s
    first_day = math.floor(start / 86400.0)
    total = 0.0
    for day in range(first_day, math.floor(end / 86400.0) + 1):
        lo, hi = day * 86400.0 + hour * 3600.0, day * 86400.0 + (hour + 1) * 3600.0
        total += max(0.0, min(hi, end) - max(lo, start))
    return total / 3600.0


def monthly(trails: TrailSet) -> list[dict[str, Any]]:
    """Per calendar month (UTC) covered by the period: burst rate, duty cycle, capacity."""
    data = trails.trails
    if data is None or not len(data):
        return []
    import datetime as dt

    both = np.minimum(data.open_s["up"], data.open_s["down"])
    covered = exclusive_open(data.t, both)
    uplink = exclusive_open(data.t, data.open_s["up"])
    stamps = trails.start_unix + data.t
    out = []
    start = trails.scenario.start
    end = start + dt.timedelta(seconds=trails.scenario.duration_s)
    cursor = dt.datetime(start.year, start.month, 1, tzinfo=dt.UTC)
    while cursor < end:
        nxt = dt.datetime(cursor.year + cursor.month // 12, cursor.month % 12 + 1, 1, tzinfo=dt.UTC)
        lo, hi = max(cursor, start).timestamp(), min(nxt, end).timestamp()
        sel = (stamps >= lo) & (stamps < hi)
        hours = (hi - lo) / 3600.0
        opened = both[sel & (both > 0)]
        out.append(
            {
                "month": cursor.strftime("%Y-%m"),
                "bursts_per_hour": len(opened) / hours,
                "duty_cycle": float(covered[sel].sum()) / (hours * 3600.0),
                "capacity_bits_per_hour": float(uplink[sel].sum()) * trails.scenario.bit_rate / hours,
            }
        )
        cursor = nxt
    return out


def trail_records(trails: TrailSet) -> Iterator[dict[str, Any]]:
    """Every trail of the set as the JSON object ``--trails`` writes."""
    data = trails.trails
    if data is None:
        return
    kinds = [trails.kind_name(k) for k in range(2 + len(sky.SHOWERS))]
    for i in range(len(data)):
        record: dict[str, Any] = {
            "t_s": round(float(data.t[i]), 4),
            "kind": kinds[int(data.kind[i])],
            "height_km": round(float(data.height_km[i]), 3),
            "q": float(f"{data.q[i]:.4g}"),
        }
        for d in DIRECTIONS:
            peak = float(data.peak_ebn0[d][i])
            record[d] = {
                "peak_snr_db": round(10 * math.log10(peak), 2) if peak > 0 else None,
                "tau_s": round(float(data.tau[d][i]), 5),
                "open_s": round(float(data.open_s[d][i]), 5),
                "doppler_hz": round(float(data.doppler_hz[d][i]), 2),
            }
        yield record


def write_trails(trails: TrailSet, out: TextIO) -> int:
    count = 0
    for record in trail_records(trails):
        out.write(json.dumps(record) + "\n")
        count += 1
    return count
