"""Generate the tables in docs/ from the code that defines them.

Documents keep their prose by hand; each table sits between
``<!-- generated: NAME -->`` and ``<!-- end generated -->`` and is rewritten
from ``ionotrail.terminal.wire.formats`` (frame layouts), the frame-type
registry ``ionotrail.terminal.wire.registry``, ``ionotrail.terminal.modem``
(host-modem records, line errors), or ``ionotrail.terminal.limits`` (link
limits and the reasons for their defaults).  A test fails when a document is
stale; run ``ionotrail docs`` to refresh them.
"""

from __future__ import annotations

import ast
import dataclasses
import inspect
import itertools
import re

import construct as cs
from ionotrail.terminal import limits
from ionotrail.terminal.modem import dialects, records
from ionotrail.terminal.outbox import records as store_records
from ionotrail.terminal.wire import formats, layout
from ionotrail.terminal.wire.formats import FrameType
from ionotrail.terminal.wire.registry import FRAME_KINDS

SECTIONS: dict[str, cs.Construct] = {kind.name: kind.declaration for kind in FRAME_KINDS.values()} | {
    "ack-block": formats.ACK_BLOCK,
    "command-block": formats.COMMAND_BLOCK,
    "sealed-message": formats.SEALED_MESSAGE,
} | {f"record-{kind.name.replace('_', '-')}": kind.declaration for kind in records.RECORD_KINDS.values()} | {
    f"store-{name}": declaration for name, declaration in store_records.DECLARATIONS.items()
}

_BLOCK_NAMES = {id(formats.ACK_BLOCK): "ack block", id(formats.COMMAND_BLOCK): "command block"}
_MARK = re.compile(r"(<!-- generated: ([a-z-]+) -->\n).*?(<!-- end generated -->)", re.DOTALL)


def _unwrap(con: cs.Construct) -> tuple[cs.Construct, str]:
    """Strip naming layers, keeping the innermost documentation string."""
    docs = ""
    while isinstance(con, cs.Renamed):
        docs = con.docs or docs
        con = con.subcon
    return con, docs


def _size(con: cs.Construct, unit: str) -> str:
    try:
        count = con.sizeof()
    except cs.SizeofError:
        return "variable"
    return f"{count} {unit if count != 1 else unit.rstrip('s')}"


def _rows(struct: cs.Struct, prefix: str, unit: str) -> list[tuple[str, str, str]]:
    rows: list[tuple[str, str, str]] = []
    for sub in struct.subcons:
        inner, docs = _unwrap(sub)
        name = f"{prefix}{sub.name}"
        condition = ""
        if isinstance(inner, cs.IfThenElse):
            condition = " (present only if its flag is set)"
            inner, _ = _unwrap(inner.thensubcon)
        if isinstance(inner, (cs.Const, cs.Rebuild)):
            inner = inner.subcon
        if id(inner) in _BLOCK_NAMES:
            rows.append((name, "variable", f"{docs}; see {_BLOCK_NAMES[id(inner)]}{condition}"))
        elif isinstance(inner, cs.RawCopy):
            body = inner.subcon
            rows.extend(_rows(body.subcon if isinstance(body, formats.Body) else body, prefix, unit))
        elif isinstance(inner, cs.Checksum):
            rows.append((name, _size(inner.checksumfield, unit), docs))
        elif isinstance(inner, cs.Transformed) and isinstance(inner.subcon, cs.Struct):  # BitStruct
            rows.append((name, _size(inner, unit), docs + condition))
            rows.extend(_rows(inner.subcon, f"{name}.", "bits"))
        elif isinstance(inner, cs.Array):
            element = _unwrap(inner.subcon)[0]
            rows.append((f"{name}[]", f"count x {_size(element, unit)}", docs + condition))
            rows.extend(_rows(element, f"{name}[].", unit))
        else:
            rows.append((name, _size(inner, unit), docs + condition))
    return rows


def table(con: cs.Construct) -> str:
    """Markdown table of one declaration, fields in wire order."""
    lines = ["| field | size | meaning |", "| --- | --- | --- |"]
    for name, size, docs in _rows(con, "", "bytes"):
        lines.append(f"| `{name}` | {size} | {docs} |")
    return "\n".join(lines) + "\n"


def frame_types_table() -> str:
    """Markdown table of the frame types (from the registry), then the unassigned type values."""
    lines = ["| type | value | direction | purpose |", "| --- | --- | --- | --- |"]
    lines += [f"| {k.name} | {int(t)} | {k.direction} | {k.purpose} |" for t, k in FRAME_KINDS.items()]
    width = layout.bit_members(formats.HEAD, "the head")["type"].width
    spans: list[list[int]] = []  # runs of consecutive unassigned values
    for value in range(1 << width):
        if value in set(FrameType):
            continue
        if spans and spans[-1][-1] == value - 1:
            spans[-1].append(value)
        else:
            spans.append([value])
    named = " and ".join(f"{run[0]}" if len(run) == 1 else f"{run[0]}-{run[-1]}" for run in spans)
    lines += ["", f"Types {named} are unassigned; a frame using them is refused as `unknown_type`."]
    return "\n".join(lines) + "\n"


def record_types_table() -> str:
    """Markdown table of the host-modem record types, then the unassigned type values."""
    lines = ["| type | value | direction | purpose |", "| --- | --- | --- | --- |"]
    lines += [f"| {k.name} | {int(t)} | {k.direction} | {k.purpose} |" for t, k in records.RECORD_KINDS.items()]
    width = layout.bit_members(records.HEAD, "the record head")["type"].width
    free = [str(value) for value in range(1 << width) if value not in set(records.RecordType)]
    lines += ["", f"Types {', '.join(free)} are unassigned; a record using them is refused as `unknown_type`."]
    return "\n".join(lines) + "\n"


MODEM_LIMITS = (
    "RECORD_VERSION", "MAX_RECORD_FRAME_BYTES", "MAX_RECORD_METADATA_BYTES", "MAX_SERIAL_PAYLOAD",
    "MAX_MODEM_TIME_US", "MAX_KISS_FRAME_BYTES", "MODEM_CLOCK_WINDOW", "MODEM_CLOCK_HORIZON_S",
    "MODEM_CLOCK_MIN_SPAN_S", "MAX_MODEM_DRIFT", "BACKOFF_INITIAL_S", "BACKOFF_MAX_S", "BACKOFF_JITTER",
    "WRITE_BACKLOG_MAX_BYTES", "CLOSE_TIMEOUT_S",
)


def modem_limits_table() -> str:
    """Markdown table of the host-modem bounds in terminal/limits.py: value and why (its docstring)."""
    body = ast.parse(inspect.getsource(limits)).body
    reasons: dict[str, str] = {}
    for node, after in itertools.pairwise(body):
        if (
            isinstance(node, ast.Assign)
            and isinstance(node.targets[0], ast.Name)
            and isinstance(after, ast.Expr)
            and isinstance(after.value, ast.Constant)
        ):
            reasons[node.targets[0].id] = " ".join(str(after.value.value).split())
    lines = ["| bound | value | why |", "| --- | --- | --- |"]
    lines += [f"| `{name}` | {getattr(limits, name)} | {reasons.get(name, '')} |" for name in MODEM_LIMITS]
    return "\n".join(lines) + "\n"


def line_errors_table() -> str:
    """Markdown table of the line errors a record stream returns and counts, and their answers."""
    lines = ["| reason | when | answer |", "| --- | --- | --- |"]
    for reason, meaning in dialects.LINE_ERROR_MEANINGS.items():
        code = dialects.ANSWER_CODES.get(reason)
        answer = f"error record, code {int(code)} ({code.name.lower()})" if code is not None else "none: counted only"
        lines.append(f"| `{reason}` | {meaning} | {answer} |")
    return "\n".join(lines) + "\n"


def limits_table() -> str:
    """Markdown table of every link limit: name, default, and why (its docstring)."""
    tree = ast.parse(inspect.getsource(limits.Limits))
    body = tree.body[0].body  # type: ignore[attr-defined]
    reasons: dict[str, str] = {}
    for node, after in itertools.pairwise(body):
        if (
            isinstance(node, ast.AnnAssign)
            and isinstance(node.target, ast.Name)
            and isinstance(after, ast.Expr)
            and isinstance(after.value, ast.Constant)
        ):
            reasons[node.target.id] = " ".join(str(after.value.value).split())
    lines = ["| limit | default | why |", "| --- | --- | --- |"]
    for field in dataclasses.fields(limits.Limits):
        lines.append(f"| `{field.name}` | {field.default} | {reasons.get(field.name, '')} |")
    return "\n".join(lines) + "\n"


def link_table() -> str:
    """The link's transition table as a grid: a row per state, a column per
    input; a blank cell is a pair that cannot happen (it raises)."""
    from ionotrail.terminal.link.table import TRANSITIONS, Action, Input, State

    lines = ["| state \\ input | " + " | ".join(f"{i.name}" for i in Input) + " |", "| --- |" + " --- |" * len(Input)]
    for state in State:
        cells = []
        for event in Input:
            cell = TRANSITIONS.get((state, event))
            if cell is None:
                cells.append("")
            else:
                nxt, action = cell
                cells.append(f"{nxt.name}<br>{action.name.lower()}" if nxt is not state else action.name.lower())
        lines.append(f"| **{state.name}** | " + " | ".join(cells) + " |")
    lines.append("")
    lines.append("| input | meaning |")
    lines.append("| --- | --- |")
    lines += [f"| `{i.name}` | {i.value} |" for i in Input]
    lines.append("")
    lines.append("| action | what the link does |")
    lines.append("| --- | --- |")
    lines += [f"| `{a.name.lower()}` | {a.value} |" for a in Action]
    return "\n".join(lines) + "\n"


def link_diagram() -> str:
    """The same table as a Mermaid state diagram (rendered by GitHub and most viewers)."""
    from ionotrail.terminal.link.table import TRANSITIONS, State

    lines = ["```mermaid", "stateDiagram-v2", f"    [*] --> {State.LISTENING.name}"]
    for (state, event), (nxt, action) in TRANSITIONS.items():
        lines.append(f"    {state.name} --> {nxt.name}: {event.name} / {action.name.lower()}")
    lines.append("```")
    return "\n".join(lines) + "\n"


def power_levels_table() -> str:
    """The degradation table as a grid: a row per level, a column per band of the state of charge."""
    from ionotrail.terminal.power.levels import TRANSITIONS, Band, Level

    lines = ["| level \\ band | " + " | ".join(b.name for b in Band) + " |", "| --- |" + " --- |" * len(Band)]
    for level in Level:
        cells = [TRANSITIONS[(level, band)].name if TRANSITIONS[(level, band)] is not level else "stay" for band in Band]
        lines.append(f"| **{level.name}** | " + " | ".join(cells) + " |")
    lines += ["", "| band | state of charge |", "| --- | --- |"]
    lines += [f"| `{b.name}` | {b.value} |" for b in Band]
    lines += ["", "| level | service |", "| --- | --- |"]
    lines += [f"| `{lv.name}` | {lv.value}: {_level_meaning(lv)} |" for lv in Level]
    return "\n".join(lines) + "\n"


def _level_meaning(level: object) -> str:
    from ionotrail.terminal.power.levels import Level

    doc = {Level.NORMAL: "routine traffic as the listening policy decides", Level.CONSERVE: "routine traffic deferred and sent in batches",
           Level.ALARMS_ONLY: "the receiver is off except to send an alarm"}  # fmt: skip
    return doc[level]  # type: ignore[index]


def power_chemistries_table() -> str:
    from ionotrail.terminal.power.battery import CHEMISTRIES

    lines = ["| chemistry | floor (state of charge) | charge efficiency | no charging below |", "| --- | --- | --- | --- |"]
    for c in CHEMISTRIES.values():
        cold = "-" if c.min_charge_c is None else f"{c.min_charge_c:g} deg C"
        lines.append(f"| `{c.name}` | {c.soc_floor:g} | {c.charge_efficiency:g} | {cold} |")
    return "\n".join(lines) + "\n"


def _report_table() -> str:
    from ionotrail.harness.demo.gauge import REPORT

    return table(REPORT)


def _scenario_table() -> str:
    from ionotrail.harness.channel.scenario import schema_table

    return schema_table()


GENERATORS = {name: (lambda con=con: table(con)) for name, con in SECTIONS.items()} | {
    "frame-types": frame_types_table,
    "record-types": record_types_table,
    "modem-limits": modem_limits_table,
    "line-errors": line_errors_table,
    "limits": limits_table,
    "scenario": _scenario_table,
    "link-table": link_table,
    "link-diagram": link_diagram,
    "report": _report_table,
    "power-levels": power_levels_table,
    "power-chemistries": power_chemistries_table,
}


def render(text: str) -> str:
    """The document with every generated table rewritten."""

    def replace(match: re.Match[str]) -> str:
        name = match.group(2)
        if name not in GENERATORS:
            raise KeyError(f"unknown generated table {name!r}")
        return match.group(1) + GENERATORS[name]() + match.group(3)

    return _MARK.sub(replace, text)
