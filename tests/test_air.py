"""The simulated air: what each station is told about the frames it receives."""

from __future__ import annotations

import math

import pytest
from ionotrail.harness.channel import scenario as scenarios
from ionotrail.harness.emulators.air import Air
from ionotrail.harness.runners.simulate import simulate
from ionotrail.terminal.link.terminal import Arrival

SPEED_OF_LIGHT = 299_792_458.0  # m/s, exact by the SI definition of the metre
MAX_WIND_MS = 100.0  # the fastest trail drift the channel draws (docs/channel.md, Doppler row)


def arrivals(*overrides: str) -> list[tuple[str, Arrival]]:
    """Every frame handed to either station over a simulated stretch of the demo link."""
    got: list[tuple[str, Arrival]] = []

    def watch(air: Air) -> None:
        air.on_arrival = lambda role, arrival: got.append((role, arrival))

    simulate(scenarios.load(None, [*overrides, *scenarios.PROTOCOL_ONLY]), configure_air=watch)
    return got


def test_the_terminal_sees_the_oscillator_offset_once_plus_the_trail_doppler() -> None:
    # The same seed with and without an oscillator offset draws the same trails
    # and runs the same link; without one, what the terminal measures is the
    # carrying trail's Doppler alone.  With one, it must measure exactly that
    # Doppler plus the offset between the oscillators: ppm x 1e-6 x the
    # downlink carrier (the definition of parts per million).
    still = [a for role, a in arrivals("scenario.duration_hours=2", "link.oscillator_ppm=0") if role == "terminal"]
    drifting = [a for role, a in arrivals("scenario.duration_hours=2", "link.oscillator_ppm=2") if role == "terminal"]
    demo = scenarios.load(None)
    oscillator_hz = 2.0 * 1e-6 * demo.down_mhz * 1e6
    assert len(still) > 1000 and len(drifting) == len(still)
    # The trail's Doppler is 2 v cos(phi) / lambda (McKinley 1961), so never
    # more than 2 v_max / lambda: without oscillators the terminal sees no more.
    bound = 2 * MAX_WIND_MS / (SPEED_OF_LIGHT / (demo.down_mhz * 1e6))
    for plain, shifted in zip(still, drifting, strict=True):
        assert (shifted.frame, shifted.time) == (plain.frame, plain.time)
        assert abs(plain.frequency_offset_hz) <= bound
        assert shifted.frequency_offset_hz == pytest.approx(oscillator_hz + plain.frequency_offset_hz, abs=1e-9)


def bpsk_frame_success(ebn0_db: float, bits: int) -> float:
    """A frame of ``bits`` at a constant Eb/N0: every bit right, each with
    probability 1 - Pb, Pb = erfc(sqrt(Eb/N0)) / 2 for coherent BPSK
    (Proakis, Digital Communications, BPSK bit-error probability)."""
    if ebn0_db == -math.inf:
        return 0.0
    pb = 0.5 * math.erfc(math.sqrt(10 ** (ebn0_db / 10)))
    return math.exp(bits * math.log1p(-pb))


@pytest.mark.parametrize("hours", [2.0, 24.0])
def test_no_frame_is_reported_at_an_snr_it_could_not_survive(hours: float) -> None:
    # A frame handed to a station was received, so the Eb/N0 reported with it
    # must be one at which a frame of its length gets through with some real
    # chance: 1e-6 (the audible-window floor the air uses for probes).  The
    # demo link is BPSK; 24 hours is the demo day.
    got = arrivals(f"scenario.duration_hours={hours}")
    assert len(got) > 5000
    assert {role for role, _ in got} == {"terminal", "master"}
    worst = min(got, key=lambda item: bpsk_frame_success(item[1].snr_db, 8 * len(item[1].frame)))
    role, arrival = worst
    p = bpsk_frame_success(arrival.snr_db, 8 * len(arrival.frame))
    assert p >= 1e-6, f"{role} got {len(arrival.frame)} bytes at {arrival.snr_db:.1f} dB (success {p:.1e})"
