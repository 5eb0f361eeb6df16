"""Dialects: how records travel on one serial line.

A dialect encodes records into line bytes and makes streams that decode line
bytes from the other side into records.  Two ship:

* ``ionotrail``: every record of :mod:`~ionotrail.terminal.modem.records`,
  with its CRC, COBS-framed with a zero delimiter
  (:mod:`~ionotrail.terminal.wire.serial_framing`).
* ``kiss``: the TNC host framing of 1987 (FEND 0xC0 ends a frame, FESC 0xDB
  escapes, TFEND 0xDC and TFESC 0xDD follow FESC; the first byte is port and
  command).  Data frames carry air frames both ways and nothing else: no host
  id, no time, no SNR, no offset.

A stream never raises on received bytes: what it refuses comes back as a
:class:`LineError` among the records, in line order, and is counted.  Its
buffer holds at most one maximal record.
"""

from __future__ import annotations

import abc
import enum
import math
from typing import ClassVar, NamedTuple

from ionotrail.terminal.errors import DecodeError, Reason, UsageError
from ionotrail.terminal.limits import MAX_KISS_FRAME_BYTES, MAX_RECORD_FRAME_BYTES, MAX_SERIAL_PAYLOAD
from ionotrail.terminal.modem.records import (
    HOST_TO_MODEM,
    MODEM_TO_HOST,
    ErrorAnswer,
    ErrorCode,
    Received,
    Record,
    RecordType,
    Transmit,
    decode_record_body,
    encode_record_body,
    head_type,
    record_type_of,
)
from ionotrail.terminal.wire.serial_framing import Deframer, encode_record


class Side(enum.Enum):
    """Which end of the line we are."""

    HOST = "host"
    MODEM = "modem"


class LineError(NamedTuple):
    """A record (or run of bytes) refused; never raised, always returned."""

    reason: str
    """One of :data:`LINE_ERROR_REASONS`."""
    record_type: int
    """The refused record's type when it could be read, else 0."""
    answer: bool
    """True when the receiving side should answer with an :class:`ErrorAnswer`."""


LINE_ERROR_MEANINGS = {
    "bad_crc": "the record's CRC-16 does not match its bytes",
    "unknown_type": "the record type is not assigned",
    "malformed": "a field is cut short, bytes are left over, or a value is out of range",
    "unsupported_version": "the record format version is not one this side reads",
    "bad_line_code": "the bytes between two delimiters are not valid COBS (KISS: a broken escape)",
    "overrun": "more bytes than the largest record arrived without a delimiter; dropped up to the next",
    "wrong_direction": "a valid record that only the other side accepts (a modem record sent to a modem)",
}
"""What each :attr:`LineError.reason` means."""

LINE_ERROR_REASONS = tuple(LINE_ERROR_MEANINGS)
"""Every :attr:`LineError.reason`, each also a key of :attr:`RecordStream.counters`."""

ANSWER_CODES: dict[str, ErrorCode] = {
    "bad_crc": ErrorCode.BAD_CRC,
    "unknown_type": ErrorCode.UNKNOWN_TYPE,
    "malformed": ErrorCode.MALFORMED,
    "unsupported_version": ErrorCode.UNSUPPORTED_VERSION,
    "wrong_direction": ErrorCode.UNKNOWN_TYPE,
}
"""The error code that answers each answerable line error (a type the
receiving side does not accept is unknown to it)."""


def error_answer(error: LineError) -> ErrorAnswer:
    """The error answer for a line error whose ``answer`` is True."""
    if not error.answer or error.reason not in ANSWER_CODES:
        raise UsageError(f"a {error.reason} line error is not answered")
    return ErrorAnswer(ANSWER_CODES[error.reason], error.record_type)


def _accepted(side: Side) -> frozenset[RecordType]:
    """Record types the other side may send to ``side``."""
    if not isinstance(side, Side):
        raise UsageError(f"side must be Side.HOST or Side.MODEM, not {side!r}")
    return MODEM_TO_HOST if side is Side.HOST else HOST_TO_MODEM


class RecordStream(abc.ABC):
    """Line bytes from the other side in, records and line errors out.

    Made by :meth:`Dialect.stream`; feed it bytes in pieces of any size."""

    def __init__(self, side: Side) -> None:
        self.side = side
        self.accepted = _accepted(side)
        self.counters: dict[str, int] = {"records": 0} | {reason: 0 for reason in LINE_ERROR_REASONS}

    @abc.abstractmethod
    def feed(self, data: bytes) -> list[Record | LineError]:
        """Take received bytes; return the records and line errors they complete, in line order."""

    @property
    @abc.abstractmethod
    def buffered(self) -> int:
        """Bytes held while waiting for the end of a record (bounded by the dialect)."""

    def _refuse(self, out: list[Record | LineError], reason: str, record_type: int = 0, answer: bool = False) -> None:
        self.counters[reason] += 1
        out.append(LineError(reason, record_type, answer))

    def _deliver(self, out: list[Record | LineError], record: Record) -> None:
        record_type = record_type_of(record)
        if record_type not in self.accepted:
            self._refuse(out, "wrong_direction", int(record_type), answer=True)
            return
        self.counters["records"] += 1
        out.append(record)


class Dialect(abc.ABC):
    """One way of carrying records on a serial line."""

    name: ClassVar[str]

    @abc.abstractmethod
    def encode(self, record: Record) -> bytes:
        """Line bytes for one record; :class:`UsageError` if this dialect cannot carry it."""

    @abc.abstractmethod
    def carries(self, record_type: RecordType) -> bool:
        """Whether records of this type travel in this dialect."""

    @abc.abstractmethod
    def stream(self, side: Side) -> RecordStream:
        """A decoder for what the other side sends to ``side``."""


# --- ours: records, CRC, COBS ------------------------------------------------------------

_LINE_REASONS = {
    Reason.BAD_CRC: "bad_crc",
    Reason.UNSUPPORTED_VERSION: "unsupported_version",
    Reason.UNKNOWN_TYPE: "unknown_type",
}


class IonotrailStream(RecordStream):
    """COBS records with CRC: a damaged record costs only itself."""

    def __init__(self, side: Side) -> None:
        super().__init__(side)
        self._deframer = Deframer(MAX_SERIAL_PAYLOAD)

    @property
    def buffered(self) -> int:
        return self._deframer.buffered

    def feed(self, data: bytes) -> list[Record | LineError]:
        out: list[Record | LineError] = []
        view = bytes(data)
        start = 0
        while start < len(view):
            end = view.find(0, start)
            stop = len(view) if end < 0 else end + 1
            self._segment(view[start:stop], out)
            start = stop
        return out

    def _segment(self, chunk: bytes, out: list[Record | LineError]) -> None:
        """One run of bytes holding at most one delimiter, at its end."""
        counters = self._deframer.counters
        bad, overruns = counters.bad_records, counters.overruns
        bodies = self._deframer.feed(chunk)
        if counters.overruns != overruns:
            self._refuse(out, "overrun")
        if counters.bad_records != bad:
            self._refuse(out, "bad_line_code")
        for body in bodies:
            self._decode(body, out)

    def _decode(self, body: bytes, out: list[Record | LineError]) -> None:
        try:
            record = decode_record_body(body)
        except DecodeError as exc:
            reason = _LINE_REASONS.get(exc.reason, "malformed")
            type_code = head_type(body)
            readable = reason in ("unknown_type", "malformed")
            self._refuse(out, reason, type_code if readable else 0, answer=type_code != RecordType.ERROR)
            return
        self._deliver(out, record)


class IonotrailDialect(Dialect):
    """Every record, with CRC and version, COBS-framed (docs/modem.md)."""

    name = "ionotrail"

    def encode(self, record: Record) -> bytes:
        return encode_record(encode_record_body(record))

    def carries(self, record_type: RecordType) -> bool:
        return record_type in RecordType

    def stream(self, side: Side) -> RecordStream:
        return IonotrailStream(side)


# --- KISS ----------------------------------------------------------------------------------

FEND = 0xC0
FESC = 0xDB
TFEND = 0xDC
TFESC = 0xDD
KISS_DATA = 0x0
KISS_RETURN = 0xFF
"""The one command byte that is not port and command: leave KISS mode."""

_ESCAPES = {FEND: bytes((FESC, TFEND)), FESC: bytes((FESC, TFESC))}
_UNESCAPE = {TFEND: FEND, TFESC: FESC}


def kiss_escape(data: bytes) -> bytes:
    """FEND and FESC in ``data`` replaced by their two-byte escapes."""
    return bytes(data).replace(bytes((FESC,)), _ESCAPES[FESC]).replace(bytes((FEND,)), _ESCAPES[FEND])


class KissStream(RecordStream):
    """KISS frames: data frames become records; other commands are counted
    (``kiss_commands``), frames for other ports too (``other_port``)."""

    def __init__(self, side: Side, port: int) -> None:
        super().__init__(side)
        self.port = port
        self.counters |= {"kiss_commands": 0, "other_port": 0}
        self._frame = bytearray()
        self._escaped = False
        self._discarding = False

    @property
    def buffered(self) -> int:
        return len(self._frame)

    def feed(self, data: bytes) -> list[Record | LineError]:
        out: list[Record | LineError] = []
        for byte in bytes(data):
            if byte == FEND:
                if self._escaped and not self._discarding:
                    self._refuse(out, "bad_line_code")  # FESC FEND: the frame's last escape is broken
                elif self._frame and not self._discarding:
                    self._close(out)
                self._frame.clear()
                self._escaped = self._discarding = False
            elif self._discarding:
                continue
            elif self._escaped:
                self._escaped = False
                if byte not in _UNESCAPE:
                    self._drop(out, "bad_line_code")
                else:
                    self._append(out, _UNESCAPE[byte])
            elif byte == FESC:
                self._escaped = True
            else:
                self._append(out, byte)
        return out

    def _append(self, out: list[Record | LineError], byte: int) -> None:
        if len(self._frame) >= MAX_KISS_FRAME_BYTES:
            self._drop(out, "overrun")
        else:
            self._frame.append(byte)

    def _drop(self, out: list[Record | LineError], reason: str) -> None:
        """Refuse the frame being assembled and ignore the line up to the next FEND."""
        self._refuse(out, reason)
        self._frame.clear()
        self._discarding = True

    def _close(self, out: list[Record | LineError]) -> None:
        first, payload = self._frame[0], bytes(self._frame[1:])
        if first == KISS_RETURN or (first >> 4 == self.port and first & 0x0F != KISS_DATA):
            self.counters["kiss_commands"] += 1
        elif first >> 4 != self.port:
            self.counters["other_port"] += 1
        elif not 1 <= len(payload) <= MAX_RECORD_FRAME_BYTES:
            self._refuse(out, "malformed", int(RecordType.RECEIVED if self.side is Side.HOST else RecordType.TRANSMIT))
        elif self.side is Side.HOST:
            self._deliver(out, Received(math.nan, math.nan, math.nan, payload))
        else:
            self._deliver(out, Transmit(0, payload))


class KissDialect(Dialect):
    """KISS data frames on one TNC port: transmit requests down, received frames up."""

    name = "kiss"
    CARRIED: ClassVar[frozenset[RecordType]] = frozenset({RecordType.TRANSMIT, RecordType.RECEIVED})

    def __init__(self, port: int = 0) -> None:
        if not isinstance(port, int) or isinstance(port, bool) or not 0 <= port <= 15:
            raise UsageError(f"KISS port={port!r} must be an integer from 0 to 15")
        self.port = port

    def encode(self, record: Record) -> bytes:
        if not isinstance(record, (Transmit, Received)):
            raise UsageError(f"KISS carries only transmit and received frames, not {type(record).__name__}")
        head = bytes(((self.port << 4) | KISS_DATA,))
        return bytes((FEND,)) + kiss_escape(head + record.frame) + bytes((FEND,))

    def carries(self, record_type: RecordType) -> bool:
        return record_type in self.CARRIED

    def stream(self, side: Side) -> RecordStream:
        return KissStream(side, self.port)


DIALECTS: dict[str, Dialect] = {"ionotrail": IonotrailDialect(), "kiss": KissDialect()}
"""The dialects by name."""


def dialect(name: str) -> Dialect:
    """The dialect called ``name``."""
    found = DIALECTS.get(name) if isinstance(name, str) else None
    if found is None:
        raise UsageError(f"unknown dialect {name!r}; choose one of {', '.join(sorted(DIALECTS))}")
    return found
