"""The master adapter: the endpoint bound to a port and the loop's clock."""

from __future__ import annotations

import asyncio

from ionotrail.harness.channel import scenario as scenarios
from ionotrail.harness.channel.model import Channel, TrailSet, with_openings
from ionotrail.harness.emulators.air import Air
from ionotrail.harness.emulators.master import MasterStation
from ionotrail.harness.runners.vtime import VirtualTimeLoop
from ionotrail.terminal.link.terminal import Arrival
from ionotrail.terminal.wire import Fragment, encode

ORIGIN = 306899.56139328144  # a loop time at which origin + t - origin rounds below t for some t


def _rounding_arrival() -> float:
    """An arrival offset whose news deadline, turned into loop time and back, comes out
    one step early (found by search; the property of doubles, not of the code)."""
    for k in range(1, 100_000):
        t = k * 0.001
        deadline = ((ORIGIN + t) - ORIGIN) + 0.1
        if (ORIGIN + deadline) - ORIGIN < deadline:
            return t
    raise AssertionError("no rounding case found")


class CountingStation(MasterStation):
    fires = 0

    def _fire(self) -> None:
        self.fires += 1
        assert self.fires < 1000, f"the timer fired {self.fires} times without the clock moving"
        super()._fire()


def test_the_adapter_timer_never_spins_at_one_instant_when_the_origin_is_not_zero() -> None:
    scenario = scenarios.load(None, ["scenario.duration_hours=0.01"])
    t = _rounding_arrival()

    async def main() -> int:
        loop = asyncio.get_running_loop()
        air = Air(Channel(with_openings(TrailSet(scenario), [])), seed=1, origin=loop.time())
        station = CountingStation(air.master, 7, origin=loop.time())
        station.start()
        for message_id in (7, 8):  # news for two messages: the second waits for a rotation
            station._arrived(Arrival(encode(Fragment(2, 7, message_id, 0, b"half")), ORIGIN + t, 10.0))
        await asyncio.sleep(1.0)
        await station.stop()
        return station.fires

    with asyncio.Runner(loop_factory=lambda: VirtualTimeLoop(ORIGIN)) as runner:
        fires = runner.run(main())
    assert 1 <= fires < 10
