"""COBS record framing on the serial line between host and radio modem.

Each record is COBS-encoded (Cheshire and Baker, IEEE/ACM Trans. Networking
7(2), 1999) and followed by one zero byte; the encoding itself comes from the
``cobs`` package.  :class:`Deframer` is the streaming side: it accepts bytes
in pieces of any size, never buffers more than one maximal encoded record,
and resynchronises at the next zero after line noise or an overlong record.
It never raises on received bytes; it counts what it throws away.
"""

from __future__ import annotations

import dataclasses

from cobs import cobs
from ionotrail.terminal.errors import BadLineCode, UsageError
from ionotrail.terminal.limits import MAX_SERIAL_PAYLOAD, cobs_encoded_max

DELIMITER = b"\x00"


def encode_record(payload: bytes, max_payload: int = MAX_SERIAL_PAYLOAD) -> bytes:
    """One record as sent on the line: COBS encoding, then the delimiter."""
    if len(payload) > max_payload:
        raise UsageError(f"serial record of {len(payload)} bytes exceeds the {max_payload}-byte limit")
    encoded: bytes = cobs.encode(bytes(payload))
    return encoded + DELIMITER


def decode_record(encoded: bytes, max_payload: int = MAX_SERIAL_PAYLOAD) -> bytes:
    """Decode one record's bytes (without its delimiter)."""
    if len(encoded) > cobs_encoded_max(max_payload):
        raise BadLineCode(f"serial record of {len(encoded)} encoded bytes exceeds the {max_payload}-byte limit")
    try:
        payload = cobs.decode(bytes(encoded))
    except cobs.DecodeError as exc:
        raise BadLineCode(f"serial record is not valid COBS: {exc}") from None
    if len(payload) > max_payload:
        raise BadLineCode(f"serial record decodes to {len(payload)} bytes, over the {max_payload}-byte limit")
    return bytes(payload)


@dataclasses.dataclass(slots=True)
class DeframerCounters:
    """What the deframer delivered and discarded since it was made."""

    records: int = 0
    bad_records: int = 0
    overruns: int = 0
    discarded_bytes: int = 0


class Deframer:
    """Streaming COBS decoder with a bounded buffer."""

    def __init__(self, max_payload: int = MAX_SERIAL_PAYLOAD) -> None:
        self.max_payload = max_payload
        self.max_encoded = cobs_encoded_max(max_payload)
        self.counters = DeframerCounters()
        self._buffer = bytearray()
        self._discarding = False

    @property
    def buffered(self) -> int:
        """Bytes held while waiting for a delimiter (never above ``max_encoded``)."""
        return len(self._buffer)

    def feed(self, data: bytes) -> list[bytes]:
        """Take received bytes; return the records they complete, in order."""
        records: list[bytes] = []
        start = 0
        while True:
            end = data.find(0, start)
            if end < 0:
                self._hold(data[start:])
                return records
            self._hold(data[start:end])
            self._close(records)
            start = end + 1

    def _hold(self, chunk: bytes) -> None:
        if not chunk:
            return
        if self._discarding:
            self.counters.discarded_bytes += len(chunk)
        elif len(self._buffer) + len(chunk) > self.max_encoded:
            self.counters.overruns += 1
            self.counters.discarded_bytes += len(self._buffer) + len(chunk)
            self._buffer.clear()
            self._discarding = True
        else:
            self._buffer += chunk

    def _close(self, records: list[bytes]) -> None:
        if self._discarding:
            self._discarding = False
            return
        if not self._buffer:
            return  # idle delimiters between records are harmless
        try:
            records.append(decode_record(bytes(self._buffer), self.max_payload))
            self.counters.records += 1
        except BadLineCode:
            self.counters.bad_records += 1
            self.counters.discarded_bytes += len(self._buffer)
        self._buffer.clear()
