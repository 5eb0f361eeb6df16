"""Frame traces: every frame a station sent or heard, one JSON object a line.

``--trace FILE.jsonl`` on ``simulate``, ``serve``, ``master`` and ``soak``
writes, for each frame that crosses a station's port::

    {"t": 12.345678, "station": "terminal", "direction": "in", "hex": "1107...",
     "snr_db": 14.2, "offset_hz": 81.0, "outcome": "ok"}

``t`` is seconds since the run started on the station's clock; ``direction``
is ``out`` (the station transmitted it, or started a probe stream with it:
outcome ``probe_stream``) or ``in`` (the modem delivered it); ``outcome`` of
an arriving frame is what this project's decoder says of it (``ok`` or the
refusal reason, e.g. ``bad_crc``); ``snr_db`` and ``offset_hz`` are null
when the modem did not measure them.  ``ionotrail decode --trace FILE`` reads
the file back, so a user can set our view beside their firmware's log.

:class:`TracingPort` wraps any :class:`~ionotrail.terminal.ports.Port`, so
the trace sees exactly what the station's shell sent and received.
"""

from __future__ import annotations

import json
import math
from collections.abc import Callable, Iterator
from typing import IO, Any

from ionotrail.terminal.errors import DecodeError
from ionotrail.terminal.link.terminal import Arrival
from ionotrail.terminal.ports import Listener, Port
from ionotrail.terminal.wire import decode

TRACE_KEYS = ("t", "station", "direction", "hex", "snr_db", "offset_hz", "outcome")
"""Every trace line has exactly these keys (a contract)."""


def _number(value: float) -> float | None:
    return None if math.isnan(value) else round(value, 3)


class TraceWriter:
    """Writes trace lines to ``stream``; ``clock`` gives the time, ``origin`` its zero."""

    def __init__(self, stream: IO[str], clock: Callable[[], float], origin: float) -> None:
        self.stream, self.clock, self.origin = stream, clock, origin
        self.lines = 0

    def frame(self, station: str, direction: str, frame: bytes, outcome: str, *, t: float | None = None,
              snr_db: float = math.nan, offset_hz: float = math.nan) -> None:  # fmt: skip
        when = self.clock() if t is None else t
        line = {"t": round(when - self.origin, 6), "station": station, "direction": direction, "hex": frame.hex(),
                "snr_db": _number(snr_db), "offset_hz": _number(offset_hz), "outcome": outcome}  # fmt: skip
        self.stream.write(json.dumps(line) + "\n")
        self.lines += 1


def outcome_of(frame: bytes) -> str:
    """What the frame decoder says of received bytes: ``ok`` or the refusal reason."""
    try:
        decode(frame)
    except DecodeError as error:
        return error.reason.value
    return "ok"


class TracingPort(Port):
    """A port that writes every frame crossing it to a trace, then passes it on."""

    def __init__(self, port: Port, writer: TraceWriter, station: str) -> None:
        self.port, self.writer, self.station = port, writer, station

    def attach(self, listener: Listener) -> None:
        def traced(arrival: Arrival) -> None:
            self.writer.frame(self.station, "in", arrival.frame, outcome_of(arrival.frame), t=arrival.time,
                              snr_db=arrival.snr_db, offset_hz=arrival.frequency_offset_hz)  # fmt: skip
            listener(arrival)

        self.port.attach(traced)

    def send(self, frame: bytes) -> None:
        self.writer.frame(self.station, "out", frame, "sent")
        self.port.send(frame)

    def start_listening(self) -> None:
        self.port.start_listening()

    def stop_listening(self) -> None:
        self.port.stop_listening()

    def start_probing(self, frame: bytes, interval: float) -> None:
        self.writer.frame(self.station, "out", frame, "probe_stream")
        self.port.start_probing(frame, interval)

    def stop_probing(self) -> None:
        self.port.stop_probing()

    async def close(self) -> None:
        await self.port.close()


def read_trace(lines: Iterator[str], origin: str) -> Iterator[tuple[str, bytes | str]]:
    """(label, frame bytes) per trace line, or (label, error text) for a line that is not one."""
    for number, line in enumerate(lines, 1):
        if not line.strip():
            continue
        label = f"{origin}:{number}"
        try:
            item: Any = json.loads(line)
            if not isinstance(item, dict) or set(item) != set(TRACE_KEYS):
                raise ValueError(f"expected the keys {', '.join(TRACE_KEYS)}")
            frame = bytes.fromhex(item["hex"])
            t = float(item["t"])
        except (ValueError, TypeError, OverflowError) as exc:  # OverflowError: a "t" too large for a float
            yield label, f"not a trace line ({exc})"
            continue
        except RecursionError:
            yield label, "not a trace line (JSON nested too deeply)"
            continue
        yield f"{label} t={t:.6f} {item['station']} {item['direction']} {item['outcome']}", frame
