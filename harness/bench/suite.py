"""Benchmarks that print figures; speed is never asserted in tests.

Each figure is measured side by side with a baseline in the same run, and
reported as a ratio, because the machines this runs on are shared and noisy.
"""

from __future__ import annotations

import platform
import struct
import time
from collections.abc import Callable
from typing import Any

from ionotrail.terminal.limits import FRAGMENT_OVERHEAD_BYTES
from ionotrail.terminal.link.policy import POLICY_NAMES
from ionotrail.terminal.wire import Ack, AckBlock, Command, CommandBlock, Fragment, Probe, Reply, ReplyStatus, kind_of
from ionotrail.terminal.wire.codec import decode, decode_with_construct, encode, encode_with_construct
from ionotrail.terminal.wire.crc import using_c_extension
from ionotrail.terminal.wire.frames import Frame


def _batch_size(fn: Callable[[], object], seconds: float) -> int:
    """Calls of ``fn`` that take about ``seconds``."""
    batch = 1
    while True:
        start = time.perf_counter()
        for _ in range(batch):
            fn()
        elapsed = time.perf_counter() - start
        if elapsed >= seconds / 4:
            return max(1, int(batch * seconds / elapsed))
        batch *= 4


def _rates(fns: dict[str, Callable[[], object]], seconds: float, rounds: int = 5) -> dict[str, float]:
    """Calls per second of each function, best of ``rounds``.

    The functions are timed in turn within each round, so a compared pair
    sees the same machine load; ``seconds`` is the time per function.
    """
    batches = {name: _batch_size(fn, seconds / rounds) for name, fn in fns.items()}
    best = {name: float("inf") for name in fns}
    for _ in range(rounds):
        for name, fn in fns.items():
            start = time.perf_counter()
            for _ in range(batches[name]):
                fn()
            best[name] = min(best[name], time.perf_counter() - start)
    return {name: batches[name] / best[name] for name in fns}


def _baseline(fmt: str, tail: int) -> tuple[Callable[[bytes], object], Callable[[tuple[Any, ...], bytes], bytes]]:
    """Plain struct unpack/pack of a fixed layout followed by ``tail`` raw bytes."""
    layout = struct.Struct(fmt)

    def unpack(data: bytes) -> object:
        return layout.unpack_from(data), data[layout.size : layout.size + tail]

    def pack(values: tuple[Any, ...], rest: bytes) -> bytes:
        return layout.pack(*values) + rest

    return unpack, pack


SAMPLE_PAYLOAD = bytes(range(64))

# Representative frames, each with the plain struct layout of the same fields
# (bit fields as whole bytes, CRC as a plain 16-bit integer).
SAMPLES: dict[str, tuple[Frame, str, int]] = {
    "fragment": (Fragment(0x0A31, 7, 1234, 128, SAMPLE_PAYLOAD, final=True), ">BHBHH", 64),
    "probe": (
        Probe(7, 4711, poll=0x0A31, ack=AckBlock(0x0A31, 1233, ((0, 120), (180, 240))), command=CommandBlock(9, 2, b"\x00\x3c")),
        ">BBHBHHHBHHHHBBBH",
        2,
    ),
    "ack": (Ack(7, AckBlock(0x0A31, 1234, ((0, 64), (128, 192), (256, 300)))), ">BBHHBHHHHHHH", 0),
    "command": (Command(7, 0x0A31, CommandBlock(9, 2, b"\x00\x3c\x00\x10")), ">BBHBBB", 4),
    "reply": (Reply(0x0A31, 7, 9, ReplyStatus.OK, b"\x01\x02\x03\x04"), ">BHBBBB", 4),
}


def _codec_paths(
    frame: Frame,
    wire: bytes,
    unpack: Callable[[bytes], object],
    pack: Callable[[tuple[Any, ...], bytes], bytes],
    values: tuple[Any, ...],
    rest: bytes,
) -> dict[str, Callable[[], object]]:
    """The paths timed for one frame type, each a call with no arguments."""
    return {
        "decode_fps": lambda: decode(wire),
        "baseline_decode_fps": lambda: unpack(wire),
        "encode_fps": lambda: encode(frame),
        "baseline_encode_fps": lambda: pack(values, rest),
        "construct_decode_fps": lambda: decode_with_construct(wire),
        "construct_encode_fps": lambda: encode_with_construct(frame),
    }


def codec_benchmark(seconds: float = 0.6, progress: Callable[[str], None] | None = None) -> dict[str, Any]:
    """Frames per second of every codec path, with struct baselines and ratios."""
    results: dict[str, Any] = {}
    for name, (frame, fmt, tail) in SAMPLES.items():
        if progress:
            progress(name)
        wire = encode(frame)
        unpack, pack = _baseline(fmt, tail)
        values = unpack(wire)[0]  # type: ignore[index]
        rest = wire[struct.calcsize(fmt) : struct.calcsize(fmt) + tail]
        row: dict[str, Any] = {"frame_bytes": len(wire)}
        row.update(_rates(_codec_paths(frame, wire, unpack, pack, values, rest), seconds))
        row["path"] = "struct fast path" if kind_of(frame).fast_decode is not None else "construct"
        row["ratio_to_baseline"] = row["baseline_decode_fps"] / row["decode_fps"]
        row["encode_ratio_to_baseline"] = row["baseline_encode_fps"] / row["encode_fps"]
        results[name] = row
    return {
        "python": platform.python_version(),
        "crcmod_c_extension": using_c_extension(),
        "frame_types": results,
    }


def format_codec(report: dict[str, Any]) -> str:
    """Human-readable table of :func:`codec_benchmark` output."""
    head = (
        f"{'frame':<9} {'bytes':>5} {'decode/s':>10} {'encode/s':>10} {'struct/s':>10} "
        f"{'ratio':>6} {'construct/s':>11}  path"
    )
    lines = [head, "-" * len(head)]
    for name, r in report["frame_types"].items():
        lines.append(
            f"{name:<9} {r['frame_bytes']:>5} {r['decode_fps']:>10,.0f} {r['encode_fps']:>10,.0f} "
            f"{r['baseline_decode_fps']:>10,.0f} {r['ratio_to_baseline']:>5.1f}x {r['construct_decode_fps']:>11,.0f}  {r['path']}"
        )
    lines.append("")
    lines.append("ratio = struct baseline decode rate / decode rate (1.0 would match a bare struct.unpack).")
    lines.append(f"python {report['python']}, crcmod C extension: {report['crcmod_c_extension']}")
    return "\n".join(lines)


# --- reassembly ---------------------------------------------------------------------

REASSEMBLY_SIZES = (16, 32, 64, 128, 256)
MESSAGE_BYTES = 1024


def reassembly_benchmark(seconds: float = 1.0, progress: Callable[[str], None] | None = None) -> dict[str, Any]:
    """Fragments per second through sender and receiver, and framing efficiency,
    per fragment payload size.  Each fragment is encoded and decoded on the way,
    as on a real link; acknowledgements go back once per message."""
    from ionotrail.terminal.delivery.reassembly import Reassembler
    from ionotrail.terminal.delivery.sender import Sender
    from ionotrail.terminal.limits import MESSAGE_CRC_BYTES, Limits
    from ionotrail.terminal.wire import Ack

    payload = bytes(i % 251 for i in range(MESSAGE_BYTES))
    results: dict[str, Any] = {}
    for size in REASSEMBLY_SIZES:
        if progress:
            progress(f"{size}-byte fragments")
        # The whole message goes in one opening with no acknowledgement until its
        # end: every fragment of it stays unconfirmed until then.
        limits = Limits(max_fragment_payload=size, max_unconfirmed_pieces=-(-(MESSAGE_BYTES + MESSAGE_CRC_BYTES) // size))
        sender, receiver = Sender(0x0A31, 7, limits=limits), Reassembler(limits)
        sender_time = receiver_time = 0.0
        fragments = air = delivered_payload = 0
        now = 0.0
        while sender_time + receiver_time < seconds:
            now += 1.0
            start = time.perf_counter()
            sender.queue(payload, now)
            frames = [encode(f) for f in sender.fill(1 << 20, now)]
            middle = time.perf_counter()
            ack = None
            for frame in frames:
                reception = receiver.receive(decode(frame), now)  # type: ignore[arg-type]
                ack = reception.ack
                if reception.delivery is not None:
                    delivered_payload += len(reception.delivery.payload)
            ack_frame = encode(Ack(7, ack))  # type: ignore[arg-type]
            end = time.perf_counter()
            sender.on_ack(decode(ack_frame).ack, now)  # type: ignore[union-attr]
            sender_time += (middle - start) + (time.perf_counter() - end)
            receiver_time += end - middle
            fragments += len(frames)
            air += sum(len(f) for f in frames)
        results[str(size)] = {
            "fragment_payload_bytes": size,
            "fragments_per_s": fragments / (sender_time + receiver_time),
            "sender_fragments_per_s": fragments / sender_time,
            "receiver_fragments_per_s": fragments / receiver_time,
            "framing_efficiency": delivered_payload / air,
            "header_efficiency": size / (size + FRAGMENT_OVERHEAD_BYTES),
            "messages": sender.counters.acknowledged,
        }
    return {"python": platform.python_version(), "message_bytes": MESSAGE_BYTES, "fragment_sizes": results}


def format_reassembly(report: dict[str, Any]) -> str:
    head = f"{'payload':>7} {'fragments/s':>12} {'sender/s':>10} {'receiver/s':>11} {'efficiency':>10} {'per frame':>9}"
    lines = [head, "-" * len(head)]
    for row in report["fragment_sizes"].values():
        lines.append(
            f"{row['fragment_payload_bytes']:>7} {row['fragments_per_s']:>12,.0f} {row['sender_fragments_per_s']:>10,.0f} "
            f"{row['receiver_fragments_per_s']:>11,.0f} {row['framing_efficiency']:>9.1%} {row['header_efficiency']:>9.1%}"
        )
    lines.append("")
    lines.append(
        f"efficiency = application bytes delivered / fragment bytes on the air, {report['message_bytes']}-byte messages"
        f" (includes each message's 4-byte CRC-32C); per frame = payload / (payload + {FRAGMENT_OVERHEAD_BYTES})."
    )
    lines.append(f"one core, python {report['python']}; every fragment is encoded and decoded on the way.")
    return "\n".join(lines)


# --- channel ------------------------------------------------------------------------


def channel_benchmark(days: float = 366.0, progress: Callable[[str], None] | None = None) -> dict[str, Any]:
    """Seconds to generate a year (by default) of trails for the demo link on one core,
    and, in the same run, one day, to show that the cost is linear in the period."""
    from ionotrail.harness.channel import scenario
    from ionotrail.harness.channel.model import TrailSet

    def timed(hours: float) -> tuple[float, int, int]:
        """Seconds to draw the period window by window, as a long simulation does
        (memory: one window), and the trails drawn and kept."""
        start = time.perf_counter()
        trails = TrailSet(scenario.load(None, [f"scenario.duration_hours={hours}", "scenario.start=2027-01-01T00:00:00Z"]))
        drawn = kept = 0
        for w in range(trails.window_count):
            window, count = trails.draw_window(w)
            drawn += count
            kept += len(window)
        return time.perf_counter() - start, drawn, kept

    if progress:
        progress("one day")
    day_s = min(timed(24.0)[0] for _ in range(3))
    if progress:
        progress(f"{days:g} days")
    period_s, drawn, kept = timed(days * 24.0)
    return {
        "python": platform.python_version(),
        "days": days,
        "seconds": period_s,
        "trails_generated": drawn,
        "trails_usable": kept,
        "trails_per_second": drawn / period_s,
        "day_seconds": day_s,
        "period_to_day_ratio": period_s / day_s,
    }


def format_channel(report: dict[str, Any]) -> str:
    return (
        f"{report['days']:g} days of demo-link trails: {report['seconds']:.2f} s on one core, "
        f"{report['trails_generated']:,} trails drawn ({report['trails_per_second']:,.0f}/s), "
        f"{report['trails_usable']:,} open in a direction\n"
        f"one day: {report['day_seconds'] * 1000:.0f} ms; the period costs {report['period_to_day_ratio']:.0f} days' worth "
        f"(python {report['python']})"
    )


# --- the burst link ------------------------------------------------------------------

BACKLOG_MESSAGE_BYTES = 1001  # a 9-byte report header and 496 readings


def link_benchmark(hours: float = 24.0, policies: tuple[str, ...] = POLICY_NAMES, progress: Callable[[str], None] | None = None) -> dict[str, Any]:
    """Every policy on the same demo-day realisation with a backlogged source.

    efficiency = payload bits delivered / the oracle bound (the expected payload
    of the best fragment lengths for every opening, known in advance:
    harness/channel/oracle.py); efficiency_vs_open_time = payload bits
    delivered / the open-time bound (uplink open time x bit rate, no
    overhead); bits_per_burst = payload bits per trail
    that carried at least one intact frame; speedup = simulated seconds per
    wall-clock second of that policy's run (trail generation excluded: it is
    shared, and reported on its own).
    """
    from ionotrail.harness.channel import scenario
    from ionotrail.harness.channel.model import TrailSet
    from ionotrail.harness.runners.simulate import simulate

    demo = scenario.load(None, [f"scenario.duration_hours={hours}", *scenario.PROTOCOL_ONLY])  # the fragment policy alone
    start = time.perf_counter()
    trails = TrailSet(demo)
    generation = time.perf_counter() - start
    results: dict[str, dict[str, Any]] = {}
    for name in policies:
        if progress:
            progress(f"link, {name}")
        run = simulate(demo, name, source="backlog", trails=trails, backlog_size=BACKLOG_MESSAGE_BYTES)
        r = run.report
        wall = r["wall_seconds"]  # the run alone: not the oracle bound computed after it
        used = r["trails"]["used"]
        results[name] = {
            "efficiency": round(r["bits"]["payload_delivered"] / r["bits"]["oracle_bound"], 4) if r["bits"]["oracle_bound"] else None,
            "efficiency_vs_open_time": round(r["bits"]["payload_delivered"] / r["bits"]["capacity_bound"], 4) if r["bits"]["capacity_bound"] else None,
            "bits_per_burst": round(r["bits"]["payload_delivered"] / used) if used else 0,
            "speedup": round(demo.duration_s / wall),
            "wall_seconds": round(wall, 3),
            "messages_delivered": r["messages"]["delivered"],
            "frames_sent": r["frames"]["sent"],
            "frames_received": r["frames"]["received"],
            "oracle_bound_bits": r["bits"]["oracle_bound"],
        }
    fixed = {k: v["efficiency"] for k, v in results.items() if k.startswith("fixed-")}
    best_fixed = max(fixed, key=lambda k: fixed[k]) if fixed else None
    return {
        "python": platform.python_version(),
        "scenario": demo.name,
        "seed": demo.seed,
        "sim_seconds": demo.duration_s,
        "capacity_bound_bits": round(trails.capacity_bits("up")),
        "oracle_bound_bits": next(iter(results.values()))["oracle_bound_bits"] if results else None,
        "trail_generation_s": round(generation, 3),
        "backlog_message_bytes": BACKLOG_MESSAGE_BYTES,
        "best_fixed": best_fixed,
        "policies": results,
    }


def format_link(report: dict[str, Any]) -> str:
    lines = [
        (f"{report['scenario']}, seed {report['seed']}, {report['sim_seconds'] / 3600:g} h, backlogged source "
        f"({report['backlog_message_bytes']}-byte messages); oracle bound {report['oracle_bound_bits'] / 1e6:.2f} Mbit, "
        f"open-time bound {report['capacity_bound_bits'] / 1e6:.2f} Mbit"),
        "",
        f"{'policy':<14} {'efficiency':>10} {'vs open':>8} {'bits/burst':>10} {'speedup':>9} {'wall s':>7}",
    ]
    for name, r in report["policies"].items():
        lines.append(f"{name:<14} {r['efficiency']:>10.3f} {r['efficiency_vs_open_time']:>8.3f} {r['bits_per_burst']:>10,} {r['speedup']:>8,}x {r['wall_seconds']:>7.2f}")
    lines += [
        "",
        f"best fixed size: {report['best_fixed']}; trails generated once in {report['trail_generation_s']:.2f} s.",
        "efficiency: payload delivered / oracle bound (best fragment lengths per opening, known in advance);",
        "vs open: payload delivered / open-time bound (uplink open time x bit rate, no overhead);",
        "bits/burst: payload bits per trail that carried an intact frame; speedup: simulated s per wall s.",
    ]
    return "\n".join(lines)


# --- power ------------------------------------------------------------------------------

POWER_POLICIES = ("always-on", "fixed-duty", "adaptive")


def _power_run(args: tuple[float, str]) -> dict[str, Any]:
    """One power policy over the demo period (in a worker process)."""
    from ionotrail.harness.channel import scenario
    from ionotrail.harness.runners.simulate import simulate

    days, policy = args
    demo = scenario.load(None, [f"scenario.duration_hours={days * 24}"])
    start = time.process_time()
    r = simulate(demo, power_policy=policy, bounds=False).report
    cpu = time.process_time() - start
    e, m, lat = r["energy"], r["messages"], r["latency_s"]
    used_wh = sum(e["consumed_wh"].values())
    return {
        "offered": m["offered"],
        "delivered": m["delivered"],
        "pending": m["pending"],
        "abandoned": m["abandoned"],
        "deadlines_missed": m["deadlines_missed"]["alarm"] + m["deadlines_missed"]["routine"],
        "deadlines_missed_by_priority": m["deadlines_missed"],
        "soc_min": e["soc_min"],
        "soc_final": e["soc_final"],
        "hours_below_reserve": e["hours_below_reserve"],
        "consumed_wh": round(used_wh, 3),
        "consumed_by_load_wh": e["consumed_wh"],
        "harvested_wh": e["harvested_wh"],
        "messages_per_kwh": round(m["delivered"] / (used_wh / 1000.0), 1) if used_wh > 0 else None,
        "listen_hours": e["listen_hours"],
        "tx_seconds": e["tx_seconds"],
        "wasted_tx_seconds": e["wasted_tx_seconds"],
        "latency_s": {p: {"p50": lat[p]["p50"], "p95": lat[p]["p95"], "max": lat[p]["max"]} for p in ("alarm", "routine")},
        "cpu_seconds": round(cpu, 1),
        "scenario": r["scenario"],
        "seed": r["seed"],
    }


def power_benchmark(days: float = 365.0, policies: tuple[str, ...] = POWER_POLICIES, workers: int = 2,
                    progress: Callable[[str], None] | None = None) -> dict[str, Any]:  # fmt: skip
    """Every power policy over ``days`` of the demo scenario: the same trails,
    weather and sensor (one seed), each policy in its own run (``workers``
    processes at a time).  messages_per_kwh = messages delivered per kWh the
    terminal consumed (every load: controller, receiver, modem, transmitter,
    sensor); deadlines_missed counts messages delivered after their deadline,
    still pending past it at the end, or abandoned."""
    from concurrent.futures import ProcessPoolExecutor

    start = time.perf_counter()
    results: dict[str, dict[str, Any]] = {}
    jobs = [(days, name) for name in policies]
    if workers > 1 and len(jobs) > 1:
        if progress:
            progress(f"power, {', '.join(policies)} over {days:g} days, {min(workers, len(jobs))} at a time")
        with ProcessPoolExecutor(max_workers=min(workers, len(jobs))) as pool:
            for name, result in zip(policies, pool.map(_power_run, jobs), strict=True):
                results[name] = result
    else:
        for job in jobs:
            if progress:
                progress(f"power, {job[1]}")
            results[job[1]] = _power_run(job)
    first = next(iter(results.values()))
    return {
        "python": platform.python_version(),
        "scenario": first["scenario"],
        "seed": first["seed"],
        "days": days,
        "wall_seconds": round(time.perf_counter() - start, 1),
        "policies": results,
    }


def format_power(report: dict[str, Any]) -> str:
    def s(value: float | None) -> str:
        return "-" if value is None else f"{value:,.0f}"

    lines = [
        f"{report['scenario']}, seed {report['seed']}, {report['days']:g} days, the same channel, weather and sensor for every policy",
        "",
        (
            f"{'policy':<11} {'delivered':>9} {'missed':>6} {'soc min':>7} {'used Wh':>8} {'msg/kWh':>8} {'listen h':>8}"
            f" {'alarm p50/p95 s':>16} {'routine p50/p95 s':>18} {'cpu s':>6}"
        ),
    ]
    for name, r in report["policies"].items():
        a, rt = r["latency_s"]["alarm"], r["latency_s"]["routine"]
        lines.append(
            f"{name:<11} {r['delivered']:>9,} {r['deadlines_missed']:>6,} {100 * r['soc_min']:>6.1f}% {r['consumed_wh']:>8,.1f}"
            f" {s(r['messages_per_kwh']):>8} {r['listen_hours']:>8,.0f} {s(a['p50']) + ' / ' + s(a['p95']):>16}"
            f" {s(rt['p50']) + ' / ' + s(rt['p95']):>18} {r['cpu_seconds']:>6,.0f}"
        )
    policies = report["policies"]
    if "adaptive" in policies and "fixed-duty" in policies:
        a, f = policies["adaptive"], policies["fixed-duty"]
        if a["messages_per_kwh"] and f["messages_per_kwh"]:
            ratio = a["messages_per_kwh"] / f["messages_per_kwh"]
            lines += ["", f"adaptive / fixed-duty: {ratio:.2f}x the messages per kWh, {a['deadlines_missed']:,} vs {f['deadlines_missed']:,} deadlines missed"]
    lines.append(f"wall time {report['wall_seconds']:,.0f} s")
    return "\n".join(lines)
