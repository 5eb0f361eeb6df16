"""A simulated period as a picture: bursts, deliveries, the queue and the battery, on one time axis."""

from __future__ import annotations

from pathlib import Path
from typing import Any

from ionotrail.harness.emulators.master import DeliveryRecord
from ionotrail.harness.runners.simulate import Timeline


def plot_timeline(timeline: Timeline, deliveries: list[DeliveryRecord], report: dict[str, Any], path: Path) -> None:
    """Three panels sharing the time axis (hours from the start):

    1. every trail that opened the uplink, at its start, by its peak Eb/N0, its
       open time as the marker's size (grey), and over them the bursts the
       terminal worked, by the Eb/N0 of the probe that opened each (red);
    2. every delivered message at its delivery time, by its latency, with the
       running count on a second axis;
    3. messages waiting in the terminal's queue;
    4. the battery's state of charge, with its reserve and conserve thresholds,
       the receiver's listening windows as a band under it, and each change of
       service level (conserve, alarms only, normal) marked and named.
    """
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt
    import matplotlib.ticker

    hours = report["sim_seconds"] / 3600
    scale = 3600.0
    fig, axes = plt.subplots(4, 1, figsize=(12, 10.5), sharex=True, gridspec_kw={"height_ratios": [3, 3, 2, 2.5]})
    top, middle, bottom, power = axes

    if timeline.openings:
        top.scatter(
            [o[0] / scale for o in timeline.openings],
            [o[1] for o in timeline.openings],
            s=[4 + 6 * min(o[2], 15) for o in timeline.openings],
            color="0.7",
            label="trail openings (uplink; size: open time)",
        )
    if timeline.bursts:
        top.scatter([b[0] / scale for b in timeline.bursts], [b[2] for b in timeline.bursts], s=10, color="C3", label="bursts the terminal used")
    top.legend(loc="upper right", fontsize=8)
    top.set_ylabel("Eb/N0, dB")
    top.set_title(
        f"{report['scenario']}: seed {report['seed']}, policy {report['policy']}; "
        f"{report['messages']['delivered']} of {report['messages']['offered']} messages delivered, "
        f"{len(timeline.bursts)} bursts"
    )
    top.grid(alpha=0.3)

    timed = [(r.delivered_s / scale, r.delivered_s - r.created_s) for r in deliveries if r.created_s is not None]
    if timed:
        middle.scatter([t for t, _ in timed], [lat for _, lat in timed], s=8, color="C1", label="latency")
        middle.set_yscale("log")
    middle.set_ylabel("latency, s")
    middle.grid(alpha=0.3)
    count = middle.twinx()
    times = sorted(r.delivered_s / scale for r in deliveries)
    count.step(times, range(1, len(times) + 1), where="post", color="C2")
    count.set_ylabel("delivered (running total)", color="C2")

    if timeline.queue:
        bottom.step([t / scale for t, _ in timeline.queue], [n for _, n in timeline.queue], where="post", color="C3")
    bottom.yaxis.set_major_locator(matplotlib.ticker.MaxNLocator(integer=True))
    bottom.set_ylabel("queued messages")
    bottom.grid(alpha=0.3)

    energy = timeline.energy
    e = report["energy"]
    if energy.soc:
        power.plot([t / scale for t, _ in energy.soc], [100 * v for _, v in energy.soc], color="C0", label="state of charge")
    power.axhline(100 * e["conserve_soc"], color="C1", linestyle="--", linewidth=1, label="conserve (routine batched below)")
    power.axhline(100 * e["reserve_soc"], color="C3", linestyle="--", linewidth=1, label="reserve (alarms only below)")
    if energy.listening:
        power.broken_barh([(a / scale, (b - a) / scale) for a, b in energy.listening], (0, 4), color="C2", label="receiver listening")
    for t, level in energy.levels:
        power.axvline(t / scale, color="0.4", linewidth=0.8, linestyle=":")
        power.annotate(level, (t / scale, 96), fontsize=7, rotation=90, va="top", ha="right", color="0.3")
    power.set_ylim(0, 100)
    power.set_ylabel("battery, %")
    power.set_xlabel("hours from start")
    power.set_xlim(0, hours)
    power.legend(loc="lower right", fontsize=8)
    power.set_title(
        f"energy ({e['policy']}): harvested {e['harvested_wh']:,.1f} Wh, used {sum(e['consumed_wh'].values()):,.1f} Wh,"
        f" listened {e['listen_hours']:,.1f} h, {e['hours_below_reserve']:,.1f} h below the reserve",
        fontsize=9,
    )
    power.grid(alpha=0.3)

    fig.tight_layout()
    fig.savefig(path, dpi=110)
    plt.close(fig)
