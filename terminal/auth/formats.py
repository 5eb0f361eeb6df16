"""Construct declarations of everything authentication encodes: the single source of truth.

Four kinds of byte string are declared here, each with fixed-width fields
or an explicit length before every variable part, so that two different
sets of fields can never encode to the same bytes (an ambiguity there
would let a tag made for one thing verify for another):

* ``DERIVATION_INFO``: the HKDF ``info`` of every key this stack derives;
* ``COMMAND_MAC``, ``REPLY_MAC``, ``FRAGMENT_MAC``: what a tag covers, every
  field that affects how a frame is processed;
* ``KEY_FILE``: a secret on disk (docs/keys.md has its table, generated
  from this declaration);
* ``ROOT_RECORD``, ``WINDOW_RECORD``, ``COUNTER_RECORD``, ``PREVIOUS_RECORD``,
  ``MASTER_RECORD``: the durable state of both ends, as store records.

Only the interpreted declarations are used on bytes read from outside.
"""

from __future__ import annotations

import enum

from construct import (
    Bytes,
    Checksum,
    Const,
    Int8ub,
    Int16ub,
    Int32ub,
    RawCopy,
    Rebuild,
    Struct,
    len_,
    this,
)
from ionotrail.terminal.limits import AUTH_KEY_BYTES
from ionotrail.terminal.wire.crc import crc32c


class Direction(enum.IntEnum):
    """Which way a frame travels; part of every derived key and every tag."""

    DOWNLINK = 0
    """Master to terminal."""
    UPLINK = 1
    """Terminal to master."""


class Purpose(enum.IntEnum):
    """What a key authenticates; a key serves one purpose only."""

    COMMAND = 1
    REPLY = 2
    DATA = 3


class Derivation(enum.IntEnum):
    """Which step of the key hierarchy an HKDF call is (docs/keys.md)."""

    TERMINAL_ROOT = 1
    """Site secret to a terminal's root key of epoch 0."""
    NEXT_ROOT = 2
    """A terminal's root key of epoch e to that of epoch e + 1."""
    WORKING_KEY = 3
    """A root key to the key of one direction and purpose."""


class Role(enum.IntEnum):
    """What a key file holds."""

    SITE_SECRET = 1
    """The site's master secret: every terminal's keys derive from it; it stays at the master."""
    TERMINAL_ROOT = 2
    """One terminal's root key for one epoch: all that terminal is provisioned with."""


LABEL = b"ionotrail-auth\x00\x01"
"""Fixed prefix of every HKDF info string: names the protocol and its version,
so no other use of the same secret can produce the same derivation."""

AUTH_VERSION = 1
"""Version of the MAC inputs below; carried in each, so a future layout can never collide with this one."""

DERIVATION_INFO = Struct(
    "label" / Const(LABEL) * "protocol name and derivation version",
    "step" / Int8ub * "1 terminal root, 2 next root, 3 working key",
    "terminal" / Int16ub * "terminal address",
    "epoch" / Int16ub * "key epoch the derived key belongs to",
    "direction" / Int8ub * "0 downlink, 1 uplink (working keys; else 0)",
    "purpose" / Int8ub * "1 command, 2 reply, 3 data (working keys; else 0)",
)
"""HKDF ``info``: 23 bytes, every field fixed-width."""

COMMAND_MAC = Struct(
    "version" / Int8ub * "authentication version (1)",
    "purpose" / Const(int(Purpose.COMMAND), Int8ub) * "1: a command",
    "direction" / Int8ub * "0: downlink",
    "frame_version" / Int8ub * "format version of the frame carrying the command",
    "master" / Int8ub * "master-station id",
    "terminal" / Int16ub * "terminal address",
    "epoch" / Int16ub * "key epoch the tag was made with",
    "counter" / Int32ub * "frame counter (anti-replay)",
    "command_id" / Int8ub * "command id",
    "opcode" / Int8ub * "opcode",
    "length" / Rebuild(Int8ub, len_(this.arguments)) * "argument bytes that follow",
    "arguments" / Bytes(this.length) * "opcode arguments",
)
"""What a command's tag covers."""

REPLY_MAC = Struct(
    "version" / Int8ub * "authentication version (1)",
    "purpose" / Const(int(Purpose.REPLY), Int8ub) * "2: a reply",
    "direction" / Int8ub * "1: uplink",
    "frame_version" / Int8ub * "format version of the frame carrying the reply",
    "master" / Int8ub * "master-station id",
    "terminal" / Int16ub * "terminal address",
    "epoch" / Int16ub * "key epoch the tag was made with",
    "counter" / Int32ub * "frame counter (anti-replay)",
    "command_id" / Int8ub * "the command answered",
    "status" / Int8ub * "reply status",
    "length" / Rebuild(Int8ub, len_(this.result)) * "result bytes that follow",
    "result" / Bytes(this.length) * "opcode result",
)
"""What a reply's tag covers."""

FRAGMENT_MAC = Struct(
    "version" / Int8ub * "authentication version (1)",
    "purpose" / Const(int(Purpose.DATA), Int8ub) * "3: data",
    "direction" / Int8ub * "0 downlink, 1 uplink",
    "frame_version" / Int8ub * "format version of the fragment frame",
    "master" / Int8ub * "master-station id",
    "terminal" / Int16ub * "terminal address",
    "epoch" / Int16ub * "key epoch the tag was made with",
    "counter" / Int32ub * "frame counter (anti-replay)",
    "message_id" / Int16ub * "message id",
    "flags" / Int8ub * "bit 0 final, bit 1 urgent",
    "offset" / Int16ub * "byte offset of the payload in the sealed message",
    "length" / Rebuild(Int16ub, len_(this.payload)) * "payload bytes that follow",
    "payload" / Bytes(this.length) * "fragment payload",
)
"""What a data fragment's tag covers."""

KEY_MAGIC = b"IONOKEY\x00"

KEY_FILE_BODY = Struct(
    "magic" / Const(KEY_MAGIC) * "identifies an ionotrail key file",
    "version" / Int8ub * "key-file format version (1)",
    "role" / Int8ub * "1 site secret, 2 terminal root",
    "terminal" / Int16ub * "terminal address (0 in a site-secret file)",
    "epoch" / Int16ub * "key epoch (0 in a site-secret file)",
    "key" / Bytes(AUTH_KEY_BYTES) * "the secret",
)

KEY_FILE = Struct(
    "body" / RawCopy(KEY_FILE_BODY) * "the fields below",
    "crc" / Checksum(Int32ub, crc32c, this.body.data) * "CRC-32C of every preceding byte",
)
"""A key file: 50 bytes, binary."""

KEY_FILE_VERSION = 1

RECORD_VERSION = 1
"""Version byte leading every durable record."""

ROOT_RECORD = Struct(
    "version" / Int8ub * "record version (1)",
    "terminal" / Int16ub * "terminal address",
    "epoch" / Int16ub * "current key epoch",
    "root" / Bytes(AUTH_KEY_BYTES) * "root key of that epoch",
)
"""A terminal's current root key (record ``auth/root``)."""

WINDOW_RECORD = Struct(
    "version" / Int8ub * "record version (1)",
    "epoch" / Int16ub * "key epoch whose frames the window counts",
    "size" / Int16ub * "window entries",
    "top" / Int32ub * "highest counter accepted (0: none yet)",
    "bitmap" / Bytes((this.size + 7) // 8) * "ring of accepted counters, bit c mod size",
)
"""An anti-replay window (records ``auth/command-window``, ``auth/previous-window``)."""

COUNTER_RECORD = Struct(
    "version" / Int8ub * "record version (1)",
    "epoch" / Int16ub * "key epoch the counters belong to",
    "reserved" / Int32ub * "highest counter the sender may use before saving again",
)
"""A sender's reserved counters (RFC 4303 s5; record ``auth/reply-counter``)."""

PREVIOUS_RECORD = Struct(
    "version" / Int8ub * "record version (1)",
    "epoch" / Int16ub * "previous key epoch",
    "root" / Bytes(AUTH_KEY_BYTES) * "root key of the previous epoch",
)
"""The previous epoch's root, kept for repeats of the rotate command (record ``auth/previous``)."""

MASTER_RECORD = Struct(
    "version" / Int8ub * "record version (1)",
    "terminal" / Int16ub * "terminal address",
    "epoch" / Int16ub * "epoch the master signs commands with",
    "target" / Int16ub * "epoch a rotation under way leads to (equal to epoch: none)",
    "reserved" / Int32ub * "highest command counter the master may use before saving again",
    "window" / WINDOW_RECORD * "replies accepted from the terminal",
)
"""The master's state for one terminal (record ``auth/master/XXXX``, the address in hex)."""

ROTATE_ARGUMENTS = Struct(
    "epoch" / Int16ub * "the key epoch to rotate to: the terminal's current epoch plus one",
)
"""Arguments of the rotate command (opcode ROTATE_OPCODE)."""
