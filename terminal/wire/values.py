"""Frame representations to and from the values their construct declarations
build and parse (the reference path of :mod:`~ionotrail.terminal.wire.codec`).

``*_fields`` give the value of a frame's fields without the head, which the
codec adds; ``*_from_fields`` build a representation from a parsed value, so
every semantic rule runs through the representation's constructor.
"""

from __future__ import annotations

from typing import Any

from construct import Container
from ionotrail.terminal.wire.frames import Ack, AckBlock, AuthFragment, Command, CommandBlock, Fragment, Probe, Reply

FieldValues = dict[str, Any]
"""A value for construct's ``build``: field name to value, nested for blocks."""


def _ack_block_fields(block: AckBlock) -> FieldValues:
    return {
        "terminal": block.terminal,
        "message_id": block.message_id,
        "status": {"complete": block.complete, "downlink": block.downlink, "refused": block.refused},
        "ranges": [{"start": s, "end": e} for s, e in block.ranges],
    }


def _command_block_fields(block: CommandBlock) -> FieldValues:
    return {
        "command_id": block.command_id,
        "opcode": block.opcode,
        "epoch": block.epoch,
        "counter": block.counter,
        "arguments": block.arguments,
        "tag": block.tag,
    }


def _ack_block(c: Container) -> AckBlock:
    return AckBlock(
        c.terminal,
        c.message_id,
        tuple((r.start, r.end) for r in c.ranges),
        c.status.complete,
        c.status.downlink,
        c.status.refused,
    )


def _command_block(c: Container) -> CommandBlock:
    return CommandBlock(c.command_id, c.opcode, c.arguments, c.epoch, c.counter, c.tag)


def probe_fields(p: Probe) -> FieldValues:
    return {
        "master": p.master,
        "sequence": p.sequence,
        "flags": {"poll": p.poll is not None, "ack": p.ack is not None, "command": p.command is not None},
        "poll": p.poll,
        "ack": None if p.ack is None else _ack_block_fields(p.ack),
        "command": None if p.command is None else _command_block_fields(p.command),
    }


def probe_from_fields(c: Container) -> Probe:
    ack = None if c.ack is None else _ack_block(c.ack)
    command = None if c.command is None else _command_block(c.command)
    return Probe(c.master, c.sequence, c.poll, ack, command)


def fragment_fields(f: Fragment) -> FieldValues:
    return {
        "terminal": f.terminal,
        "master": f.master,
        "message_id": f.message_id,
        "position": {"final": f.final, "urgent": f.urgent, "downlink": f.downlink, "offset": f.offset},
        "payload": f.payload,
    }


def fragment_from_fields(c: Container) -> Fragment:
    p = c.position
    return Fragment(c.terminal, c.master, c.message_id, p.offset, c.payload, p.final, p.urgent, p.downlink)


def ack_fields(a: Ack) -> FieldValues:
    return {"master": a.master, "ack": _ack_block_fields(a.ack)}


def ack_from_fields(c: Container) -> Ack:
    return Ack(c.master, _ack_block(c.ack))


def command_fields(c: Command) -> FieldValues:
    return {"master": c.master, "terminal": c.terminal, "command": _command_block_fields(c.command)}


def command_from_fields(c: Container) -> Command:
    return Command(c.master, c.terminal, _command_block(c.command))


def reply_fields(r: Reply) -> FieldValues:
    return {
        "terminal": r.terminal,
        "master": r.master,
        "command_id": r.command_id,
        "status": int(r.status),
        "epoch": r.epoch,
        "counter": r.counter,
        "result": r.result,
        "tag": r.tag,
    }


def reply_from_fields(c: Container) -> Reply:
    return Reply(c.terminal, c.master, c.command_id, c.status, c.result, c.epoch, c.counter, c.tag)


def tagged_fields(a: AuthFragment) -> FieldValues:
    return fragment_fields(a.fragment) | {"epoch": a.epoch, "counter": a.counter, "tag": a.tag}


def tagged_from_fields(c: Container) -> AuthFragment:
    return AuthFragment(fragment_from_fields(c), c.epoch, c.counter, c.tag)
