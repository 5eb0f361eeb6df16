"""The master-station emulator: probes, polls, acknowledges, reassembles, records.

The master keeps a probe stream going on its port.  Every probe carries the
acknowledgement for the message whose fragment arrived last (so a terminal
in a burst learns within one probe interval what got through), a poll
address when one terminal is to answer first, and a queued downlink command
for the polled terminal until that terminal's reply arrives.  Fragments are
reassembled by the same core the terminal uses (:mod:`ionotrail.terminal.delivery.reassembly`);
every delivered message goes to a sink as one JSON line:

``{"terminal": 2609, "message_id": 17, "created_s": 901.25, "delivered_s": 1034.5,
"latency_s": 133.25, "size": 83, "crc32c": "0x1c291ca3"}``

Times are seconds on the link clock from the run's start; ``created_s`` is
read from the message itself (the demo report format) and null when the
payload carries no creation time.
"""

from __future__ import annotations

import dataclasses
import json
from collections.abc import Callable
from typing import IO

from ionotrail.harness.demo.gauge import report_created
from ionotrail.terminal.delivery.reassembly import Delivery, Reassembler
from ionotrail.terminal.errors import DecodeError
from ionotrail.terminal.limits import DEFAULT_LIMITS, Limits
from ionotrail.terminal.link.terminal import Arrival
from ionotrail.terminal.ports import Port
from ionotrail.terminal.wire import AckBlock, CommandBlock, Fragment, Probe, Reply, decode, encode
from ionotrail.terminal.wire.crc import crc32c

DEFAULT_PROBE_INTERVAL = 0.1
"""Seconds between probe starts: a 7-byte probe at 4800 bit/s is on the air
12 ms, so the master still listens most of the time on its other frequency,
and a terminal learns of an opening within 0.1 s (common practice, no source)."""


@dataclasses.dataclass(frozen=True, slots=True)
class DeliveryRecord:
    terminal: int
    message_id: int
    created_s: float | None
    delivered_s: float
    size: int
    crc32c: int

    def to_json(self) -> str:
        latency = None if self.created_s is None else round(self.delivered_s - self.created_s, 3)
        return json.dumps(
            {
                "terminal": self.terminal,
                "message_id": self.message_id,
                "created_s": None if self.created_s is None else round(self.created_s, 3),
                "delivered_s": round(self.delivered_s, 3),
                "latency_s": latency,
                "size": self.size,
                "crc32c": f"0x{self.crc32c:08x}",
            }
        )


@dataclasses.dataclass(slots=True)
class MasterCounters:
    fragments: int = 0
    crc_failed: int = 0
    other_frames: int = 0
    deliveries: int = 0
    replies: int = 0
    probe_updates: int = 0


@dataclasses.dataclass(frozen=True, slots=True)
class ReplyRecord:
    terminal: int
    command_id: int
    status: int
    result: bytes
    time_s: float


class MasterStation:
    """A master that serves terminals through one port.

    ``epoch_unix`` is the Unix time of link-clock zero, to turn a message's
    creation time into link-clock seconds; ``origin`` is the loop time of
    link-clock zero.
    """

    def __init__(
        self,
        port: Port,
        address: int,
        *,
        limits: Limits = DEFAULT_LIMITS,
        probe_interval: float = DEFAULT_PROBE_INTERVAL,
        epoch_unix: float = 0.0,
        origin: float = 0.0,
        sink: Callable[[DeliveryRecord], None] | None = None,
    ) -> None:
        self.port = port
        self.address = address
        self.reassembler = Reassembler(limits)
        self.probe_interval = probe_interval
        self.epoch_unix = epoch_unix
        self.origin = origin
        self.sink = sink
        self.counters = MasterCounters()
        self.deliveries: list[DeliveryRecord] = []
        self.replies: list[ReplyRecord] = []
        self.poll: int | None = None
        self._commands: dict[int, CommandBlock] = {}  # terminal -> command awaiting its reply
        self._next_command_id = 0
        self._ack: AckBlock | None = None
        self._sequence = 0

    def start(self) -> None:
        self.port.attach(self._arrived)
        self.port.start_listening()
        self.port.start_probing(self._probe(), self.probe_interval)

    async def stop(self) -> None:
        self.port.stop_probing()
        self.port.stop_listening()

    # --- what the operator asks ------------------------------------------------------

    def command(self, terminal: int, opcode: int, arguments: bytes = b"") -> int:
        """Send a command to ``terminal`` on every probe until it replies; polls it."""
        command_id = self._next_command_id
        self._next_command_id = (self._next_command_id + 1) & 0xFF
        self._commands[terminal] = CommandBlock(command_id, opcode, arguments)
        self.poll = terminal
        self._update_probe()
        return command_id

    # --- the port's side -------------------------------------------------------------

    def _probe(self) -> bytes:
        command = self._commands.get(self.poll) if self.poll is not None else None
        return encode(Probe(self.address, self._sequence, poll=self.poll, ack=self._ack, command=command))

    def _update_probe(self) -> None:
        self._sequence = (self._sequence + 1) & 0xFFFF
        self.counters.probe_updates += 1
        self.port.start_probing(self._probe(), self.probe_interval)

    def _arrived(self, arrival: Arrival) -> None:
        try:
            frame = decode(arrival.frame)
        except DecodeError:
            self.counters.crc_failed += 1
            return
        now = arrival.time - self.origin
        if isinstance(frame, Fragment) and frame.master == self.address and not frame.downlink:
            self.counters.fragments += 1
            reception = self.reassembler.receive(frame, now)
            if reception.delivery is not None:
                self._record(reception.delivery, now)
            if reception.ack != self._ack:
                self._ack = reception.ack
                self._update_probe()
        elif isinstance(frame, Reply) and frame.master == self.address:
            self.counters.replies += 1
            pending = self._commands.get(frame.terminal)
            if pending is not None and pending.command_id == frame.command_id:
                del self._commands[frame.terminal]
                self.replies.append(ReplyRecord(frame.terminal, frame.command_id, int(frame.status), frame.result, now))
                if self.poll == frame.terminal:
                    self.poll = None
                self._update_probe()
        else:
            self.counters.other_frames += 1

    def _record(self, delivery: Delivery, now: float) -> None:
        created = report_created(delivery.payload)
        record = DeliveryRecord(
            terminal=delivery.terminal,
            message_id=delivery.message_id,
            created_s=None if created is None else created - self.epoch_unix,
            delivered_s=now,
            size=len(delivery.payload),
            crc32c=crc32c(delivery.payload),
        )
        self.counters.deliveries += 1
        self.deliveries.append(record)
        if self.sink is not None:
            self.sink(record)


def json_lines_sink(stream: IO[str]) -> Callable[[DeliveryRecord], None]:
    def write(record: DeliveryRecord) -> None:
        stream.write(record.to_json() + "\n")

    return write
