"""Messages a terminal reports: the demo sensor source and its payload format.

The demo stands for a river gauge: every 15 minutes a report of 40 to 120
bytes (a header and a run of 16-bit readings), and now and then an alarm
(a level threshold crossed) that must jump the queue.  Every message starts
with its creation time, so whoever receives it can measure the latency from
the message alone.  The payload format is declared with construct, like the
wire formats, and drawn into docs/wire.md.

Randomness comes from a generator the caller passes in (anything with
``random()`` and ``randrange()``), so the source holds no global state and a
seeded run replays exactly.
"""

from __future__ import annotations

import enum
import math
import struct
from typing import Protocol

from construct import ConstructError, Enum, GreedyRange, Int8ub, Int16sb, Int16ub, Int32ub, StreamError, Struct
from ionotrail.terminal.delivery.sender import Priority
from ionotrail.terminal.errors import BadField, UsageError
from ionotrail.terminal.wire.formats import ReplyStatus


class ReportKind(enum.IntEnum):
    REPORT = 1
    ALARM = 2


REPORT_HEADER = Struct(
    "kind" / Enum(Int8ub, ReportKind) * "1 routine report, 2 alarm",
    "sequence" / Int16ub * "report counter of the terminal, wraps",
    "created_s" / Int32ub * "creation time, whole seconds since 1970-01-01 UTC",
    "created_ms" / Int16ub * "creation time, milliseconds past created_s",
)
REPORT = Struct(
    *REPORT_HEADER.subcons,
    "readings" / GreedyRange(Int16sb) * "sensor readings, signed 16-bit, to the end",
)
"""The whole report; readings are packed and unpacked as one array (``struct``,
identical bytes, checked in tests) because construct takes about a millisecond
for a few hundred of them."""
HEADER_BYTES = 9
_READINGS = "!{}h"
REPORT_BYTES = (40, 120)  # size range of a routine report (the demo's choice)
REPORT_INTERVAL_S = 15 * 60.0
ALARMS_PER_DAY = 2.0  # mean rate of the demo's alarms
SET_INTERVAL = 1  # command opcode: set the report interval, seconds as uint32


def encode_report(kind: ReportKind, sequence: int, created_unix: float, readings: list[int]) -> bytes:
    whole = math.floor(created_unix)
    header = REPORT_HEADER.build(
        {"kind": kind, "sequence": sequence & 0xFFFF, "created_s": whole, "created_ms": min(999, int((created_unix - whole) * 1000))}
    )
    return header + struct.pack(_READINGS.format(len(readings)), *readings)


def report_created(payload: bytes) -> float | None:
    """Creation time (Unix seconds) of a demo report, or None for other payloads."""
    if len(payload) < HEADER_BYTES or (len(payload) - HEADER_BYTES) % 2 or payload[0] not in (1, 2):
        return None
    try:
        parsed = REPORT_HEADER.parse(payload[:HEADER_BYTES])
    except (ConstructError, StreamError):
        return None
    return parsed.created_s + parsed.created_ms / 1000


def decode_report(payload: bytes) -> dict[str, object]:
    """The fields of a demo report; :class:`DecodeError` when it is not one."""
    if report_created(payload) is None:
        raise BadField("not a demo report: a 9-byte header then 16-bit readings")
    header = REPORT_HEADER.parse(payload[:HEADER_BYTES])
    body = payload[HEADER_BYTES:]
    return {
        "kind": ReportKind(int(header.kind)).name.lower(),
        "sequence": header.sequence,
        "created": header.created_s + header.created_ms / 1000,
        "readings": list(struct.unpack(_READINGS.format(len(body) // 2), body)),
    }


class Generator(Protocol):
    def random(self) -> float: ...

    def randrange(self, start: int, stop: int) -> int: ...


class DemoGauge:
    """A river gauge: a report every 15 minutes, alarms at random (Poisson)."""

    def __init__(self, rng: Generator, *, epoch_unix: float = 0.0, start: float = 0.0, interval_s: float = REPORT_INTERVAL_S,
                 alarms_per_day: float = ALARMS_PER_DAY) -> None:
        if not interval_s > 0 or alarms_per_day < 0:
            raise UsageError("interval_s must be positive and alarms_per_day not negative")
        self.rng = rng
        self.epoch_unix = epoch_unix
        self.interval_s = interval_s
        self.alarm_rate = alarms_per_day / 86400.0
        self._sequence = 0
        self._level = 1200  # water level, mm, drifting
        self._next_report = start + interval_s * rng.random()  # stations are not in step
        self._next_alarm = self._draw_alarm(start)

    def _draw_alarm(self, after: float) -> float:
        if self.alarm_rate == 0:
            return math.inf
        return after - math.log(1.0 - self.rng.random()) / self.alarm_rate

    def next_due(self) -> float | None:
        return min(self._next_report, self._next_alarm)

    def take(self, now: float, room: int) -> list[tuple[bytes, Priority]]:
        out: list[tuple[bytes, Priority]] = []
        while min(self._next_report, self._next_alarm) <= now:
            if self._next_report <= self._next_alarm:
                count = self.rng.randrange((REPORT_BYTES[0] - HEADER_BYTES + 1) // 2, (REPORT_BYTES[1] - HEADER_BYTES) // 2 + 1)
                out.append((self._report(ReportKind.REPORT, self._next_report, count), Priority.ROUTINE))
                self._next_report += self.interval_s
            else:
                out.append((self._report(ReportKind.ALARM, self._next_alarm, 4), Priority.ALARM))
                self._next_alarm = self._draw_alarm(self._next_alarm)
        return out

    def _report(self, kind: ReportKind, when: float, count: int) -> bytes:
        readings = []
        for _ in range(count):
            self._level = max(0, min(30000, self._level + self.rng.randrange(-3, 4)))
            readings.append(self._level)
        self._sequence += 1
        return encode_report(kind, self._sequence, self.epoch_unix + when, readings)

    def command(self, opcode: int, arguments: bytes) -> tuple[ReplyStatus, bytes]:
        if opcode != SET_INTERVAL:
            return ReplyStatus.UNKNOWN_OPCODE, b""
        if len(arguments) != 4 or not 60 <= int.from_bytes(arguments, "big") <= 86400:
            return ReplyStatus.BAD_ARGUMENTS, b""
        self.interval_s = float(int.from_bytes(arguments, "big"))
        return ReplyStatus.OK, arguments


class Backlog:
    """An application that always has more to send: the queue never empties,
    so a measurement sees the protocol, not the offered load."""

    def __init__(self, size: int, *, epoch_unix: float = 0.0, every_s: float = 30.0, start: float = 0.0) -> None:
        if size < HEADER_BYTES + 2 or not every_s > 0:
            raise UsageError(f"backlog messages need at least {HEADER_BYTES + 2} bytes and a positive refill interval")
        self.size, self.epoch_unix, self.every_s = size, epoch_unix, every_s
        self._next = start
        self._sequence = 0

    def next_due(self) -> float | None:
        return self._next

    def take(self, now: float, room: int) -> list[tuple[bytes, Priority]]:
        self._next = now + self.every_s
        out = []
        for _ in range(room):
            self._sequence += 1
            count = (self.size - HEADER_BYTES) // 2
            readings = [self._sequence & 0x7FFF] * count
            out.append((encode_report(ReportKind.REPORT, self._sequence, self.epoch_unix + now, readings), Priority.ROUTINE))
        return out

    def command(self, opcode: int, arguments: bytes) -> tuple[ReplyStatus, bytes]:
        return ReplyStatus.REFUSED, b""
