"""Authenticated downlink commands and replies, and the keys behind them (docs/keys.md).

Pure, like the rest of the core: no clock, no randomness, no files.  Keys
are generated and key files read and written by the harness
(``ionotrail keys``); the terminal's and the master's key state leave here
only as store records for the shell to commit.

* :mod:`.primitives`: HKDF-SHA256 (RFC 5869) and truncated HMAC-SHA-256 tags;
* :mod:`.keys`: the hierarchy (site secret, terminal roots per epoch, working keys);
* :mod:`.window`: the RFC 4303 / RFC 6479 anti-replay window and the sender's durable counter;
* :mod:`.authenticator`: the master's and the terminal's authenticators, rotation, records;
* :mod:`.fragments`: the optional tag over a data fragment;
* :mod:`.keyfile`: the key file;
* :mod:`.formats`: the construct declarations of all of the above.
"""

from __future__ import annotations

from ionotrail.terminal.auth.authenticator import (
    ROTATE_OPCODE,
    Action,
    AuthCounters,
    CommandCheck,
    MasterAuthenticator,
    Outcome,
    RecordError,
    Signature,
    TerminalAuthenticator,
    command_mac_input,
    reply_mac_input,
    rotate_arguments,
)
from ionotrail.terminal.auth.formats import Direction, Purpose, Role
from ionotrail.terminal.auth.fragments import (
    FRAGMENT_AUTH_BYTES,
    fragment_mac_input,
    fragment_tag_matches,
    sign_fragment,
)
from ionotrail.terminal.auth.keyfile import KEY_FILE_BYTES, KeyFileError, decode_key_file, encode_key_file
from ionotrail.terminal.auth.keys import Key, SiteSecret, TerminalRoot
from ionotrail.terminal.auth.window import ReplayWindow, SendCounter, Verdict

__all__ = [
    "FRAGMENT_AUTH_BYTES",
    "KEY_FILE_BYTES",
    "ROTATE_OPCODE",
    "Action",
    "AuthCounters",
    "CommandCheck",
    "Direction",
    "Key",
    "KeyFileError",
    "MasterAuthenticator",
    "Outcome",
    "Purpose",
    "RecordError",
    "ReplayWindow",
    "Role",
    "SendCounter",
    "Signature",
    "SiteSecret",
    "TerminalAuthenticator",
    "TerminalRoot",
    "Verdict",
    "command_mac_input",
    "decode_key_file",
    "encode_key_file",
    "fragment_mac_input",
    "fragment_tag_matches",
    "reply_mac_input",
    "rotate_arguments",
    "sign_fragment",
]
