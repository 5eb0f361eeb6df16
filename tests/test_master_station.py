"""The master adapter: the endpoint bound to a port and the loop's clock."""

from __future__ import annotations

import asyncio
import sqlite3
from pathlib import Path

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


def test_a_master_whose_store_refuses_goes_quiet_and_loses_nothing(tmp_path: Path) -> None:
    """The store refuses commits for 15 minutes (another process holds its write
    lock, a real SQLite refusal): the master stops probing and listening, tries
    again with growing pauses, and then goes on; every message is delivered once,
    and the sink is the store's log.  (Before, the refusal escaped from a loop
    callback, and the master went on with state its store did not have.)"""
    from ionotrail.harness.runners.simulate import simulate
    from ionotrail.terminal.outbox.journal import parse_delivery
    from ionotrail.terminal.stores.sqlite import SqliteStore
    from ionotrail.terminal.wire.crc import crc32c

    path = tmp_path / "master.db"
    store = SqliteStore(path, busy_timeout=0.0)
    other = sqlite3.connect(path, isolation_level=None)
    locked = False

    def delivered(record: object) -> None:
        nonlocal locked
        if not locked:  # the first delivery: lock the store for 900 s of the run
            locked = True
            other.execute("BEGIN IMMEDIATE")
            asyncio.get_running_loop().call_later(900.0, lambda: other.execute("ROLLBACK"))

    run = simulate(scenarios.load(None), seconds=6 * 3600.0, master_store=store, on_delivery=delivered, bounds=False)
    master, report = run.master, run.report
    assert master.store_failures >= 8  # 1, 2, 4, ... 60 s pauses in 900 s: about a dozen tries
    assert not master.quiet
    log = [parse_delivery(p, e) for p, e in store.log_after(0, 1 << 20)]
    keys = [(d.terminal, d.message_id, crc32c(d.payload)) for d in log]
    assert len(keys) == len(set(keys)), "a message was delivered twice"
    assert [(r.terminal, r.message_id, r.crc32c) for r in run.deliveries] == keys  # the sink is the log
    messages = report["messages"]
    assert messages["duplicates_delivered"] == 0
    assert messages["delivered"] + messages["pending"] == messages["offered"] and messages["delivered"] == len(log)
    print(
        f"\nrefused {master.store_failures}, unheard {master.frames_unheard}, delivered {len(log)}, offered {messages['offered']}"
    )
    assert len(log) > 10  # the run went on after the store came back
