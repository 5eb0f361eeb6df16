"""Records on the serial line between host and radio modem: declarations and representations.

A record is a head byte (record format version in the high nibble, record type
in the low nibble), the fields of its type, and a CRC-16/IBM-3740 of all of
them, big-endian; on the line each record is COBS-framed with a zero delimiter
(:mod:`~ionotrail.terminal.wire.serial_framing`).  The construct declarations
below are the single source of truth: docs/modem.md's tables are generated
from them (``ionotrail docs``), and the sizes :mod:`~ionotrail.terminal.limits`
states for records are checked against them at import.

Each record type has a frozen representation whose constructor validates every
field (:class:`UsageError` for a value the wire cannot carry) and quantises
measured values to their wire resolution, so ``decode(encode(r)) == r``.
:func:`decode_record_body` is the only entry for received records; it raises
only the :class:`~ionotrail.terminal.errors.DecodeError` family.
"""

from __future__ import annotations

import dataclasses
import enum
import math
from collections.abc import Callable
from typing import Any, NamedTuple, Self, TypeAlias

from construct import (
    BitsInteger,
    BitStruct,
    Checksum,
    ChecksumError,
    Const,
    Construct,
    ConstructError,
    Container,
    Flag,
    GreedyBytes,
    Int8ub,
    Int16sb,
    Int16ub,
    Int32sb,
    Int32ub,
    Int64ub,
    RawCopy,
    StreamError,
    Struct,
    this,
)
from ionotrail.terminal.errors import (
    BadField,
    BadLength,
    CrcMismatch,
    FrameTooLong,
    TruncatedFrame,
    UnknownFrameType,
    UnsupportedVersion,
    UsageError,
)
from ionotrail.terminal.limits import (
    FRAME_CRC_BYTES,
    MAX_MODEM_TIME_US,
    MAX_RECORD_FRAME_BYTES,
    MAX_RECORD_METADATA_BYTES,
    MAX_SERIAL_PAYLOAD,
    RECORD_VERSION,
)
from ionotrail.terminal.wire import layout
from ionotrail.terminal.wire.crc import crc16
from ionotrail.terminal.wire.formats import Body, LeftoverBytes


class RecordType(enum.IntEnum):
    """Low nibble of a record's head byte.  0, 7 and 13-15 are unassigned."""

    # host to modem
    TRANSMIT = 1
    PROBE_START = 2
    PROBE_STOP = 3
    LISTEN = 4
    CONFIGURE = 5
    STATUS_QUERY = 6
    # modem to host
    TRANSMITTED = 8
    RECEIVED = 9
    STATUS = 10
    RESET = 11
    ERROR = 12


class PaState(enum.IntEnum):
    """The modem's power amplifier."""

    OFF = 0
    ON = 1
    FAULT = 2


class ResetReason(enum.IntEnum):
    """Why the modem restarted."""

    POWER_ON = 0
    WATCHDOG = 1
    BROWN_OUT = 2
    COMMANDED = 3
    OTHER = 4


class ErrorCode(enum.IntEnum):
    """Why a record was refused (the code of an error answer)."""

    UNKNOWN_TYPE = 1
    MALFORMED = 2
    BAD_CRC = 3
    UNSUPPORTED_VERSION = 4
    NOT_READY = 5


# --- declarations -----------------------------------------------------------------


def _record(*fields: Construct) -> Struct:
    """A record: the given fields, then CRC-16/IBM-3740 over all of them."""
    return Struct(
        "fields" / RawCopy(Body(Struct(*fields), FRAME_CRC_BYTES)),
        "crc" / Checksum(Int16ub, crc16, this.fields.data) * "CRC-16/IBM-3740 of every preceding byte, big-endian",
    )


HEAD = "head" / BitStruct(
    "version" / BitsInteger(4) * "record format version (this document: 1)",
    "type" / BitsInteger(4) * "record type",
) * "version and type"

UNKNOWN_I16 = -(1 << 15)
"""A signed 16-bit measurement field holding this value means "not measured"."""
UNKNOWN_I32 = -(1 << 31)
"""A signed 32-bit measurement field holding this value means "not measured"."""
UNKNOWN_U16 = (1 << 16) - 1
"""An unsigned 16-bit measurement field holding this value means "not measured"."""

_HOST_ID = Int16ub * "the host's number for this transmission; the transmitted record echoes it"
_FRAME = GreedyBytes * f"the air frame, 1 to {MAX_RECORD_FRAME_BYTES} bytes; the record's length gives the count"
_MODEM_TIME = Int64ub
_RESERVED_7 = Const(0, BitsInteger(7)) * "zero"

TRANSMIT = _record(HEAD, "host_id" / _HOST_ID, "frame" / _FRAME)
"""Host to modem: send this frame now, or right after the frame on the air."""

PROBE_START = _record(
    HEAD,
    "interval_ms" / Int16ub * "milliseconds between the starts of two probes, 1 to 65535",
    "frame" / _FRAME,
)
"""Host to modem: send this frame every interval until told otherwise; a new
probe-start replaces the frame from the next probe on."""

PROBE_STOP = _record(HEAD)
"""Host to modem: end the probe stream."""

LISTEN = _record(
    HEAD,
    "flags" / BitStruct("on" / Flag * "receiver on (else off)", "reserved" / _RESERVED_7) * "receiver switch",
)
"""Host to modem: turn the receiver on or off."""

CONFIGURE = _record(
    HEAD,
    "tx_hz" / Int32ub * "transmit frequency, hertz",
    "rx_hz" / Int32ub * "receive frequency, hertz",
    "bit_rate" / Int32ub * "air bit rate, bit/s, at least 1",
    "power_dw" / Int16ub * "transmit power, tenths of a watt",
)
"""Host to modem: radio settings; the modem answers with a status record."""

STATUS_QUERY = _record(HEAD)
"""Host to modem: answer with a status record."""

TRANSMITTED = _record(
    HEAD,
    "host_id" / _HOST_ID,
    "flags" / BitStruct("ok" / Flag * "the frame left the antenna (else it failed)", "reserved" / _RESERVED_7)
    * "outcome",
    "airtime_us" / Int32ub * "microseconds the transmitter was on for this frame",
)
"""Modem to host: a transmit request is done or failed."""

RECEIVED = _record(
    HEAD,
    "modem_time_us" / _MODEM_TIME * "when the frame's last bit arrived: modem clock, microseconds since it started",
    "snr_cdb" / Int16sb * "signal-to-noise ratio, hundredths of a dB; -32768 not measured",
    "offset_dhz" / Int32sb * "carrier frequency offset, tenths of a hertz; -2^31 not measured",
    "frame" / _FRAME,
)
"""Modem to host: a frame arrived."""

STATUS = _record(
    HEAD,
    "modem_time_us" / _MODEM_TIME * "when measured: modem clock, microseconds since it started",
    "temperature_dc" / Int16sb * "modem temperature, tenths of a degree Celsius; -32768 not measured",
    "supply_mv" / Int16ub * "supply voltage, millivolts; 65535 not measured",
    "pa" / Int8ub * "power amplifier: 0 off, 1 on, 2 fault",
    "reflected_cw" / Int16ub * "reflected power, hundredths of a watt; 65535 not measured",
)
"""Modem to host: health, in answer to a status query or a configure."""

RESET = _record(
    HEAD,
    "modem_time_us" / _MODEM_TIME * "modem clock after the restart, microseconds (small: it has just started)",
    "reason" / Int8ub * "0 power on, 1 watchdog, 2 brown-out, 3 commanded, 4 other",
)
"""Modem to host, unsolicited: the modem restarted and lost its settings."""

ERROR = _record(
    HEAD,
    "code" / Int8ub * "1 unknown type, 2 malformed, 3 bad CRC, 4 unsupported version, 5 not ready",
    "record_type" / Int8ub * "record type of the refused record; 0 when it could not be read",
)
"""Either way: the record just received was refused."""


# --- representations --------------------------------------------------------------


def _uint(name: str, value: object, bits: int, low: int = 0) -> int:
    if not isinstance(value, int) or isinstance(value, bool) or not low <= value < (1 << bits):
        raise UsageError(f"{name}={value!r} must be an integer from {low} to {(1 << bits) - 1}")
    return value


def _frame(value: object) -> bytes:
    if not isinstance(value, (bytes, bytearray, memoryview)):
        raise UsageError(f"frame must be bytes, not {type(value).__name__}")
    data = bytes(value)
    if not 1 <= len(data) <= MAX_RECORD_FRAME_BYTES:
        raise UsageError(f"frame is {len(data)} bytes; a record carries 1 to {MAX_RECORD_FRAME_BYTES}")
    return data


def _number(name: str, value: object) -> float:
    if not isinstance(value, (int, float)) or isinstance(value, bool):
        raise UsageError(f"{name}={value!r} must be a number")
    return float(value)


def _steps(name: str, value: object, scale: int, low: int, high: int, unit: str) -> int:
    """``value`` in wire steps of 1/scale, which must fall in [low, high]."""
    number = _number(name, value)
    if not math.isfinite(number) or not low <= round(number * scale) <= high:
        raise UsageError(f"{name}={value!r} must be from {low / scale} to {high / scale} {unit}")
    return round(number * scale)


def _quantised(name: str, value: object, scale: int, low: int, high: int, unit: str) -> float:
    return _steps(name, value, scale, low, high, unit) / scale


def _measured(name: str, value: object, scale: int, low: int, high: int, unit: str) -> float:
    """A measurement at its wire resolution; NaN (not measured) stays NaN."""
    if isinstance(value, float) and math.isnan(value):
        return math.nan
    return _quantised(name, value, scale, low, high, unit)


def _modem_time(value: object) -> float:
    return _quantised("modem_time_s", value, 1_000_000, 0, MAX_MODEM_TIME_US, "seconds")


def _enum(kind: type[enum.IntEnum], name: str, value: object) -> Any:
    try:
        return kind(_uint(name, value, 8))
    except ValueError:
        raise UsageError(f"{name}={value!r} is not one of {', '.join(f'{m.value} {m.name}' for m in kind)}") from None


class _TransmitFields(NamedTuple):
    host_id: int
    frame: bytes


class Transmit(_TransmitFields):
    """Send ``frame``; the transmitted record that answers carries ``host_id``."""

    __slots__ = ()

    def __new__(cls, host_id: int, frame: bytes) -> Self:
        return super().__new__(cls, _uint("host_id", host_id, 16), _frame(frame))


class _ProbeStartFields(NamedTuple):
    interval_s: float
    frame: bytes


class ProbeStart(_ProbeStartFields):
    """Send ``frame`` every ``interval_s`` seconds (millisecond resolution)."""

    __slots__ = ()

    def __new__(cls, interval_s: float, frame: bytes) -> Self:
        return super().__new__(cls, _quantised("interval_s", interval_s, 1000, 1, 0xFFFF, "seconds"), _frame(frame))


class _NoFields(NamedTuple):
    pass


class ProbeStop(_NoFields):
    """End the probe stream."""

    __slots__ = ()


class StatusQuery(_NoFields):
    """Ask for a status record."""

    __slots__ = ()


class _ListenFields(NamedTuple):
    on: bool


class Listen(_ListenFields):
    """Turn the receiver on or off."""

    __slots__ = ()

    def __new__(cls, on: bool) -> Self:
        if not isinstance(on, bool):
            raise UsageError(f"on={on!r} must be True or False")
        return super().__new__(cls, on)


class _ConfigureFields(NamedTuple):
    tx_hz: int
    rx_hz: int
    bit_rate: int
    power_w: float


class Configure(_ConfigureFields):
    """Radio settings: frequencies in hertz, bit rate, power in 0.1 W steps."""

    __slots__ = ()

    def __new__(cls, tx_hz: int, rx_hz: int, bit_rate: int, power_w: float) -> Self:
        return super().__new__(
            cls,
            _uint("tx_hz", tx_hz, 32),
            _uint("rx_hz", rx_hz, 32),
            _uint("bit_rate", bit_rate, 32, low=1),
            _quantised("power_w", power_w, 10, 0, 0xFFFF, "watts"),
        )


class _TransmittedFields(NamedTuple):
    host_id: int
    ok: bool
    airtime_s: float


class Transmitted(_TransmittedFields):
    """A transmit request done (``ok``) or failed, with the airtime it used (microsecond resolution)."""

    __slots__ = ()

    def __new__(cls, host_id: int, ok: bool, airtime_s: float) -> Self:
        if not isinstance(ok, bool):
            raise UsageError(f"ok={ok!r} must be True or False")
        airtime = _quantised("airtime_s", airtime_s, 1_000_000, 0, 0xFFFF_FFFF, "seconds")
        return super().__new__(cls, _uint("host_id", host_id, 16), ok, airtime)


class _ReceivedFields(NamedTuple):
    modem_time_s: float
    snr_db: float
    offset_hz: float
    frame: bytes


class Received(_ReceivedFields):
    """A frame that arrived, when (on the modem's clock, microsecond
    resolution) and how: SNR in 0.01 dB, offset in 0.1 Hz, NaN if not measured.
    ``modem_time_s`` is NaN only when the dialect carries no time (KISS)."""

    __slots__ = ()

    def __new__(cls, modem_time_s: float, snr_db: float, offset_hz: float, frame: bytes) -> Self:
        time = modem_time_s if isinstance(modem_time_s, float) and math.isnan(modem_time_s) else _modem_time(modem_time_s)
        return super().__new__(
            cls,
            time,
            _measured("snr_db", snr_db, 100, UNKNOWN_I16 + 1, (1 << 15) - 1, "dB"),
            _measured("offset_hz", offset_hz, 10, UNKNOWN_I32 + 1, (1 << 31) - 1, "Hz"),
            _frame(frame),
        )


class _StatusFields(NamedTuple):
    modem_time_s: float
    temperature_c: float
    supply_v: float
    pa: PaState
    reflected_w: float


class Status(_StatusFields):
    """The modem's health; a measurement it does not make is NaN."""

    __slots__ = ()

    def __new__(cls, modem_time_s: float, temperature_c: float, supply_v: float, pa: PaState, reflected_w: float) -> Self:
        return super().__new__(
            cls,
            _modem_time(modem_time_s),
            _measured("temperature_c", temperature_c, 10, UNKNOWN_I16 + 1, (1 << 15) - 1, "degrees Celsius"),
            _measured("supply_v", supply_v, 1000, 0, UNKNOWN_U16 - 1, "volts"),
            _enum(PaState, "pa", pa),
            _measured("reflected_w", reflected_w, 100, 0, UNKNOWN_U16 - 1, "watts"),
        )


class _ResetFields(NamedTuple):
    modem_time_s: float
    reason: ResetReason


class Reset(_ResetFields):
    """The modem restarted: its clock restarted and its settings are lost."""

    __slots__ = ()

    def __new__(cls, modem_time_s: float, reason: ResetReason) -> Self:
        return super().__new__(cls, _modem_time(modem_time_s), _enum(ResetReason, "reason", reason))


class _ErrorAnswerFields(NamedTuple):
    code: ErrorCode
    record_type: int


class ErrorAnswer(_ErrorAnswerFields):
    """The record just received was refused, and why; ``record_type`` is its
    type (0 when it could not be read)."""

    __slots__ = ()

    def __new__(cls, code: ErrorCode, record_type: int) -> Self:
        return super().__new__(cls, _enum(ErrorCode, "code", code), _uint("record_type", record_type, 8))


Record: TypeAlias = (
    Transmit | ProbeStart | ProbeStop | Listen | Configure | StatusQuery
    | Transmitted | Received | Status | Reset | ErrorAnswer
)

HOST_TO_MODEM = frozenset({
    RecordType.TRANSMIT, RecordType.PROBE_START, RecordType.PROBE_STOP, RecordType.LISTEN,
    RecordType.CONFIGURE, RecordType.STATUS_QUERY, RecordType.ERROR,
})
"""Types a modem accepts.  An error answer travels both ways: either side
answers a record it refuses."""

MODEM_TO_HOST = frozenset({
    RecordType.TRANSMITTED, RecordType.RECEIVED, RecordType.STATUS, RecordType.RESET, RecordType.ERROR,
})
"""Types a host accepts."""


# --- representation <-> construct values ---------------------------------------------

FieldValues = dict[str, Any]


def _time_us(seconds: float) -> int:
    if math.isnan(seconds):
        raise UsageError("a record on the line needs a modem time; NaN only comes from dialects without one")
    return round(seconds * 1_000_000)


def _or(value: float, scale: int, unknown: int) -> int:
    return unknown if math.isnan(value) else round(value * scale)


def _back(value: int, scale: int, unknown: int) -> float:
    return math.nan if value == unknown else value / scale


@dataclasses.dataclass(frozen=True, slots=True)
class RecordKind:
    """Everything known about one record type: its declaration, representation and codecs."""

    record_type: RecordType
    name: str
    representation: type[Any]
    declaration: Struct
    to_fields: Callable[[Any], FieldValues]
    from_fields: Callable[[Container], Any]
    direction: str
    purpose: str


def _kind(
    record_type: RecordType,
    representation: type[Any],
    declaration: Struct,
    to_fields: Callable[[Any], FieldValues],
    from_fields: Callable[[Container], Any],
    purpose: str,
) -> RecordKind:
    both = record_type in HOST_TO_MODEM and record_type in MODEM_TO_HOST
    direction = "either" if both else "host to modem" if record_type in HOST_TO_MODEM else "modem to host"
    return RecordKind(record_type, record_type.name.lower(), representation, declaration, to_fields, from_fields,
                      direction, purpose)


_KINDS = [
    _kind(RecordType.TRANSMIT, Transmit, TRANSMIT,
          lambda r: {"host_id": r.host_id, "frame": r.frame},
          lambda c: Transmit(c.host_id, c.frame),
          "send this frame"),
    _kind(RecordType.PROBE_START, ProbeStart, PROBE_START,
          lambda r: {"interval_ms": round(r.interval_s * 1000), "frame": r.frame},
          lambda c: ProbeStart(c.interval_ms / 1000, c.frame),
          "send this probe frame at this cadence until stopped"),
    _kind(RecordType.PROBE_STOP, ProbeStop, PROBE_STOP, lambda r: {}, lambda c: ProbeStop(), "end the probe stream"),
    _kind(RecordType.LISTEN, Listen, LISTEN,
          lambda r: {"flags": {"on": r.on}},
          lambda c: Listen(c.flags.on),
          "receiver on or off"),
    _kind(RecordType.CONFIGURE, Configure, CONFIGURE,
          lambda r: {"tx_hz": r.tx_hz, "rx_hz": r.rx_hz, "bit_rate": r.bit_rate, "power_dw": round(r.power_w * 10)},
          lambda c: Configure(c.tx_hz, c.rx_hz, c.bit_rate, c.power_dw / 10),
          "frequencies, bit rate, power"),
    _kind(RecordType.STATUS_QUERY, StatusQuery, STATUS_QUERY, lambda r: {}, lambda c: StatusQuery(),
          "ask for a status record"),
    _kind(RecordType.TRANSMITTED, Transmitted, TRANSMITTED,
          lambda r: {"host_id": r.host_id, "flags": {"ok": r.ok}, "airtime_us": _time_us(r.airtime_s)},
          lambda c: Transmitted(c.host_id, c.flags.ok, c.airtime_us / 1_000_000),
          "a transmit request done or failed, with its airtime"),
    _kind(RecordType.RECEIVED, Received, RECEIVED,
          lambda r: {
              "modem_time_us": _time_us(r.modem_time_s),
              "snr_cdb": _or(r.snr_db, 100, UNKNOWN_I16),
              "offset_dhz": _or(r.offset_hz, 10, UNKNOWN_I32),
              "frame": r.frame,
          },
          lambda c: Received(
              _modem_seconds(c.modem_time_us), _back(c.snr_cdb, 100, UNKNOWN_I16),
              _back(c.offset_dhz, 10, UNKNOWN_I32), c.frame),
          "a frame arrived: when, SNR, frequency offset"),
    _kind(RecordType.STATUS, Status, STATUS,
          lambda r: {
              "modem_time_us": _time_us(r.modem_time_s),
              "temperature_dc": _or(r.temperature_c, 10, UNKNOWN_I16),
              "supply_mv": _or(r.supply_v, 1000, UNKNOWN_U16),
              "pa": int(r.pa),
              "reflected_cw": _or(r.reflected_w, 100, UNKNOWN_U16),
          },
          lambda c: Status(
              _modem_seconds(c.modem_time_us), _back(c.temperature_dc, 10, UNKNOWN_I16),
              _back(c.supply_mv, 1000, UNKNOWN_U16), c.pa, _back(c.reflected_cw, 100, UNKNOWN_U16)),
          "health: temperature, supply, PA, reflected power"),
    _kind(RecordType.RESET, Reset, RESET,
          lambda r: {"modem_time_us": _time_us(r.modem_time_s), "reason": int(r.reason)},
          lambda c: Reset(_modem_seconds(c.modem_time_us), c.reason),
          "unsolicited: the modem restarted"),
    _kind(RecordType.ERROR, ErrorAnswer, ERROR,
          lambda r: {"code": int(r.code), "record_type": r.record_type},
          lambda c: ErrorAnswer(c.code, c.record_type),
          "the record just received was refused"),
]


def _modem_seconds(microseconds: int) -> float:
    if microseconds > MAX_MODEM_TIME_US:
        raise UsageError(f"modem time of {microseconds} us is beyond the {MAX_MODEM_TIME_US} us maximum")
    return microseconds / 1_000_000


RECORD_KINDS: dict[RecordType, RecordKind] = {kind.record_type: kind for kind in _KINDS}
"""One entry per record type, in type order."""

_BY_REPRESENTATION: dict[type[Any], RecordKind] = {kind.representation: kind for kind in _KINDS}


def record_type_of(record: Record) -> RecordType:
    """The type of a record representation."""
    kind = _BY_REPRESENTATION.get(type(record))
    if kind is None:
        raise UsageError(f"{type(record).__name__} is not a host-modem record")
    return kind.record_type


# --- encoding and decoding -------------------------------------------------------------

_HEAD = layout.bit_members(HEAD, "the record head")
_VERSION, _TYPE = _HEAD["version"], _HEAD["type"]
_SHORTEST = layout.size(HEAD) + FRAME_CRC_BYTES


def encode_record_body(record: Record) -> bytes:
    """The bytes of one record before COBS framing: head, fields, CRC."""
    kind = _BY_REPRESENTATION.get(type(record))
    if kind is None:
        raise UsageError(f"cannot encode {type(record).__name__}: not a host-modem record")
    value = kind.to_fields(record)
    value["head"] = {"version": RECORD_VERSION, "type": int(kind.record_type)}
    return bytes(kind.declaration.build({"fields": {"value": value}}))


def head_type(data: bytes) -> int:
    """The record type nibble of received bytes (0 when there are none)."""
    return (data[0] & _TYPE.mask) >> _TYPE.shift if data else 0


def decode_record_body(data: bytes | bytearray | memoryview) -> Record:
    """Decode one received record (COBS already removed).

    Checks run in order: size bounds, CRC, version, type, fields, field values;
    each refusal raises one :class:`~ionotrail.terminal.errors.DecodeError`
    subclass, never anything else."""
    if not isinstance(data, (bytes, bytearray, memoryview)):
        raise UsageError(f"records are decoded from bytes, not {type(data).__name__}")
    size = data.nbytes if isinstance(data, memoryview) else len(data)
    if size > MAX_SERIAL_PAYLOAD:
        raise FrameTooLong(f"record of {size} bytes exceeds the {MAX_SERIAL_PAYLOAD}-byte maximum")
    raw = bytes(data)
    if size < _SHORTEST:
        raise TruncatedFrame(f"record of {size} bytes is shorter than a head and CRC ({_SHORTEST} bytes)")
    if crc16(raw) != 0:
        received, computed = raw[-FRAME_CRC_BYTES:].hex(), crc16(raw[:-FRAME_CRC_BYTES])
        raise CrcMismatch(f"record CRC-16 is 0x{received}, its bytes give 0x{computed:04x}: corrupted on the line")
    version = (raw[0] & _VERSION.mask) >> _VERSION.shift
    if version != RECORD_VERSION:
        raise UnsupportedVersion(f"record format version {version}; this side reads version {RECORD_VERSION}")
    type_code = head_type(raw)
    try:
        kind = RECORD_KINDS[RecordType(type_code)]
    except ValueError:
        raise UnknownFrameType(f"record type {type_code} is not assigned in record format version {version}") from None
    try:
        parsed = kind.declaration.parse(raw).fields.value
    except StreamError:
        raise TruncatedFrame(f"{kind.name} record of {size} bytes ends inside a field") from None
    except LeftoverBytes as exc:
        raise BadLength(f"{kind.name} record: {_last_line(exc)}") from None
    except ChecksumError:  # checked above; kept so the mapping is total
        raise CrcMismatch("record CRC-16 does not match: corrupted on the line") from None
    except ConstructError as exc:
        raise BadField(f"{kind.name} record: {_last_line(exc)}") from None
    try:
        record: Record = kind.from_fields(parsed)
    except UsageError as exc:
        raise BadField(f"{kind.name} record: {exc}") from None
    return record


def _last_line(exc: ConstructError) -> str:
    lines = str(exc).splitlines()
    return lines[-1] if lines else type(exc).__name__


# --- sizes stated in terminal/limits.py, checked against the declarations --------------


def record_bytes(kind: RecordKind) -> int:
    """Bytes of the largest record of ``kind``."""
    fields = layout.frame_fields(kind.declaration)
    variable = ("frame",) if "frame" in layout.names(fields) else ()
    largest = layout.frame_bytes(kind.declaration, variable)
    return largest + (MAX_RECORD_FRAME_BYTES if variable else 0)


def check_limits() -> None:
    """MAX_SERIAL_PAYLOAD is the largest record; the head is one byte."""
    largest = max(record_bytes(kind) for kind in _KINDS)
    stated = {
        "MAX_SERIAL_PAYLOAD": (MAX_SERIAL_PAYLOAD, largest),
        "MAX_RECORD_METADATA_BYTES": (MAX_RECORD_METADATA_BYTES, largest - MAX_RECORD_FRAME_BYTES),
        "the head (bytes)": (1, layout.size(HEAD)),
        "types in the head": (True, max(RecordType) < (1 << _TYPE.width)),
    }
    for name, (value, declared) in stated.items():
        if value != declared:
            raise layout.StaleLayout(f"terminal/limits.py states {name} = {value}; the record declarations give {declared}")
    if set(RECORD_KINDS) != set(RecordType):
        raise layout.StaleLayout("every record type needs one entry in RECORD_KINDS")


check_limits()
