"""The forecast as a picture: four panels against hour of day."""

from __future__ import annotations

from pathlib import Path
from typing import Any


def plot_forecast(report: dict[str, Any], path: Path) -> None:
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    rows = report["hourly"]
    hours = [r["hour"] + 0.5 for r in rows]
    fig, axes = plt.subplots(2, 2, figsize=(11, 7), sharex=True)
    panels = [
        (axes[0][0], [r["bursts_per_hour"] for r in rows], "usable bursts per hour", "C0"),
        (axes[0][1], [100 * r["duty_cycle"] for r in rows], "duty cycle, %", "C1"),
        (axes[1][0], [r["capacity_bits_per_hour"] / 1000 for r in rows], "capacity bound, kbit per hour", "C2"),
        (axes[1][1], [r["wait_100B_s"] if r["wait_100B_s"] is not None else float("nan") for r in rows], "wait for a 100-byte message, s", "C3"),
    ]
    for ax, values, title, colour in panels:
        ax.bar(hours, values, width=0.85, color=colour)
        ax.set_title(title, fontsize=10)
        ax.grid(alpha=0.3)
        ax.set_xlim(0, 24)
        ax.set_xticks(range(0, 25, 3))
    for ax in axes[1]:
        ax.set_xlabel("hour of day, UTC")
    g = report["geometry"]
    fig.suptitle(
        f"{report['scenario']}: {g['distance_km']:.0f} km, half-angle {g['half_angle_deg']:.1f} deg, "
        f"elevation {g['elevation_deg']:.1f} deg; {report['period']['hours']:g} h from {report['period']['start']}",
        fontsize=10,
    )
    fig.tight_layout()
    fig.savefig(path, dpi=100)
    plt.close(fig)
