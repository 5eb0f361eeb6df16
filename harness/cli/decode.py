"""``ionotrail decode``: received frames, field by field."""

from __future__ import annotations

import argparse
import json
import math
import sys
from collections.abc import Iterator
from importlib import resources
from pathlib import Path
from typing import Any, NamedTuple

from ionotrail.harness.cli.common import SAFETY, UserError
from ionotrail.terminal.errors import CrcMismatch, DecodeError
from ionotrail.terminal.modem.records import Record, decode_record_body, record_type_of
from ionotrail.terminal.wire import Frame, kind_of
from ionotrail.terminal.wire.codec import decode
from ionotrail.terminal.wire.serial_framing import Deframer


def add_parser(commands: Any) -> None:
    p = commands.add_parser(
        "decode",
        help="print received frames field by field",
        description=(
            "Decode over-the-air frames and print every field, with the CRC status.\n"
            "Frames are hexadecimal (spaces and colons allowed), one per argument or,\n"
            "with --file, one per line ('#' starts a comment).  With --cobs, --file\n"
            "is a raw capture of the host-modem serial line (COBS records, docs/modem.md):\n"
            "each record's type and fields, and the air frame a record carries, decoded.\n"
            "Exit status: 0 all frames decoded, 1 some frame refused, 2 bad usage."
        ),
        epilog=SAFETY,
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    p.add_argument("hex", nargs="*", metavar="HEX", help="a frame in hexadecimal, e.g. 12 0a31 07 04d2 8080 ...")
    p.add_argument("--file", action="append", metavar="FILE", help="read frames from FILE (repeatable)")
    p.add_argument("--cobs", action="store_true", help="FILE is a binary serial capture of COBS records")
    p.add_argument("--demo", action="store_true", help="decode the bundled demo capture (one opening of a demo link)")
    p.add_argument("--trace", action="append", metavar="FILE.jsonl", help="read frames from a trace written by --trace of simulate, serve, master or soak")
    p.add_argument("--json", action="store_true", help="one JSON object per frame instead of tables")
    p.set_defaults(handler=run)


def demo_capture() -> str:
    return resources.files("ionotrail.harness.demo").joinpath("capture.hex").read_text(encoding="utf-8")


def _hex_frames(lines: Iterator[str], origin: str) -> Iterator[tuple[str, bytes | str]]:
    """(label, bytes) per frame, or (label, error text) for a line that is not hex."""
    for number, line in enumerate(lines, 1):
        text = line.split("#", 1)[0].strip().replace(" ", "").replace(":", "")
        if not text:
            continue
        label = f"{origin}:{number}"
        try:
            yield label, bytes.fromhex(text)
        except ValueError:
            yield label, f"not a hexadecimal frame: {text[:40]!r}"


class _LineRecord(NamedTuple):
    """The bytes of one host-modem record (COBS removed)."""

    data: bytes


def _cobs_frames(data: bytes, origin: str) -> Iterator[tuple[str, bytes | str | _LineRecord]]:
    deframer = Deframer()
    for number, record in enumerate(deframer.feed(data + b"\x00"), 1):
        yield f"{origin}#{number}", _LineRecord(record)
    lost = deframer.counters.bad_records + deframer.counters.overruns
    if lost:
        yield f"{origin}", f"{lost} serial records were not valid COBS or too long; skipped"


def _field_value(value: Any) -> Any:
    if isinstance(value, (bytes, bytearray)):
        return value.hex()
    if hasattr(value, "_asdict"):
        return {k: _field_value(v) for k, v in value._asdict().items()}
    if isinstance(value, tuple):
        return [_field_value(v) for v in value]
    if hasattr(value, "name") and hasattr(value, "value"):  # enum
        return value.name.lower()
    return value


def _frame_table(label: str, raw: bytes, frame: Frame) -> str:
    rows = [f"{label}  {kind_of(frame).name} frame, {len(raw)} bytes, CRC-16 ok"]
    width = max(len(k) for k in frame._fields)
    for key, value in frame._asdict().items():
        if hasattr(value, "_asdict"):  # a nested block
            inner = ", ".join(f"{k}={_show(k, v)}" for k, v in value._asdict().items())
            rows.append(f"  {key:<{width}}  {inner}")
        else:
            rows.append(f"  {key:<{width}}  {_show(key, value)}")
    return "\n".join(rows)


def _show(key: str, value: Any) -> str:
    """One field as a radio engineer would want to read it."""
    if value is None:
        return "-"
    if key in ("terminal", "poll"):
        return f"0x{value:04x} ({value})"
    if key == "ranges":
        return " ".join(f"[{start},{end})" for start, end in value) or "none"
    if isinstance(value, bytes):
        if not value:
            return "(empty)"
        readable = all(0x20 <= byte < 0x7F for byte in value)
        return value.hex() + (f'  "{value.decode("ascii")}"' if readable else "")
    if hasattr(value, "name") and hasattr(value, "value"):  # an enum
        return str(value.name.lower())
    return str(value)


def _record_table(label: str, raw: bytes, record: Record) -> str:
    name = record_type_of(record).name.lower()
    rows = [f"{label}  {name} record, {len(raw)} bytes, CRC-16 ok"]
    width = max((len(k) for k in record._fields), default=0)
    for key, value in record._asdict().items():
        if key == "frame":
            shown = f"{len(value)} bytes, decoded below"
        elif isinstance(value, float) and math.isnan(value):
            shown = "not measured"
        else:
            shown = _show(key, value)
        rows.append(f"  {key:<{width}}  {shown}")
    return "\n".join(rows)


def _describe_error(raw: bytes, exc: DecodeError) -> str:
    detail = exc.message
    if isinstance(exc, CrcMismatch):
        from ionotrail.terminal.wire.crc import crc16

        detail += f" (received 0x{raw[-2:].hex()}, computed 0x{crc16(raw[:-2]):04x})"
    return detail


def run(args: argparse.Namespace) -> int:
    if args.cobs and not args.file:
        raise UserError("--cobs reads a binary capture: give it with --file FILE")
    sources: list[tuple[str, bytes | str | _LineRecord]] = []
    if args.demo:
        sources += _hex_frames(iter(demo_capture().splitlines()), "demo")
    for path in args.file or []:
        try:
            if args.cobs:
                sources += _cobs_frames(Path(path).read_bytes(), path)
            else:
                sources += _hex_frames(iter(Path(path).read_text(encoding="utf-8").splitlines()), path)
        except (OSError, UnicodeDecodeError) as exc:
            raise UserError(f"cannot read {path}: {getattr(exc, 'strerror', None) or exc}") from None
    for path in args.trace or []:
        from ionotrail.harness.reports.trace import read_trace

        try:
            sources += read_trace(iter(Path(path).read_text(encoding="utf-8").splitlines()), path)
        except (OSError, UnicodeDecodeError) as exc:
            raise UserError(f"cannot read {path}: {getattr(exc, 'strerror', None) or exc}") from None
    sources += _hex_frames(iter(args.hex), "arg")
    if not sources:
        raise UserError("nothing to decode: give HEX frames, --file FILE, --trace FILE or --demo")
    failures = 0
    first = True
    for label, item in sources:
        if isinstance(item, str):
            failures += 1
            _emit_error(args, label, None, "bad_input", item)
            continue
        if isinstance(item, _LineRecord):
            try:
                record = decode_record_body(item.data)
            except DecodeError as exc:
                failures += 1
                _emit_error(args, label, item.data, exc.reason.value, "record: " + _describe_error(item.data, exc))
                continue
            if args.json:
                print(json.dumps({
                    "source": label, "record": record_type_of(record).name.lower(), "length": len(item.data),
                    "crc": "ok", "fields": {k: _json_number(v) for k, v in _field_value(record).items()},
                }))
            else:
                print(("" if first else "\n") + _record_table(label, item.data, record))
                first = False
            frame_bytes = getattr(record, "frame", None)
            if frame_bytes is None:
                continue
            label, item = f"{label}.frame", frame_bytes
        try:
            frame = decode(item)
        except DecodeError as exc:
            failures += 1
            _emit_error(args, label, item, exc.reason.value, _describe_error(item, exc))
            continue
        if args.json:
            record = {"source": label, "type": kind_of(frame).name, "length": len(item), "crc": "ok"}
            record["fields"] = _field_value(frame)
            print(json.dumps(record))
        else:
            print(("" if first else "\n") + _frame_table(label, item, frame))
            first = False
    return 1 if failures else 0


def _json_number(value: Any) -> Any:
    """NaN (not measured) as JSON null."""
    return None if isinstance(value, float) and math.isnan(value) else value


def _emit_error(args: argparse.Namespace, label: str, raw: bytes | None, reason: str, message: str) -> None:
    if args.json:
        record: dict[str, Any] = {"source": label, "error": reason, "message": message}
        if raw is not None:
            record["length"] = len(raw)
        print(json.dumps(record))
    else:
        print(f"{label}: error: {reason}: {message}", file=sys.stderr)
