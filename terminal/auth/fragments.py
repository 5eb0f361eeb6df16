"""Authenticating data fragments (optional): a tag over every field of one fragment.

A fragment is authenticated on its own, not the reassembled message, so a
forged fragment is dropped before it takes reassembly memory or reaches an
acknowledgement.  The sender adds the key epoch (2 bytes), a counter
(4 bytes) and the tag (AUTH_TAG_BYTES): FRAGMENT_AUTH_BYTES per fragment,
on top of the 10 of an unauthenticated fragment (docs/keys.md).  A
retransmitted fragment gets a fresh counter (RFC 6347 s4.1.2.6: an ARQ
retransmission is not a replay); the receiver checks the tag with
:func:`fragment_tag_matches`, then the counter against a
:class:`~ionotrail.terminal.auth.window.ReplayWindow` of the stream, and
only then hands the fragment to reassembly.  Keys come from
``TerminalAuthenticator.data_key`` and ``MasterAuthenticator.data_key``;
``TerminalAuthenticator.sign_fragment`` and
``MasterAuthenticator.receive_fragment`` do all of the above with the
durable counter and window.  On the air the fragment travels as the tagged
frame (``terminal/wire/formats.py``, type 6).
"""

from __future__ import annotations

from construct import ConstructError
from ionotrail.terminal.auth.formats import AUTH_VERSION, FRAGMENT_MAC, Direction
from ionotrail.terminal.auth.keys import Key
from ionotrail.terminal.auth.primitives import hmac_tag, tag_matches
from ionotrail.terminal.errors import UsageError
from ionotrail.terminal.limits import AUTH_COUNTER_BITS, AUTH_EPOCH_BITS, AUTH_TAG_BYTES, MAX_FRAGMENT_PAYLOAD
from ionotrail.terminal.wire.frames import Fragment

FRAGMENT_AUTH_BYTES = AUTH_EPOCH_BITS // 8 + AUTH_COUNTER_BITS // 8 + AUTH_TAG_BYTES
"""Bytes authentication adds to each fragment on the air (14 with the default tag)."""


def fragment_mac_input(
    *, frame_version: int, direction: Direction, master: int, terminal: int, epoch: int, counter: int,
    message_id: int, final: bool, urgent: bool, offset: int, payload: bytes,
) -> bytes:  # fmt: skip
    """What a fragment's tag covers (``FRAGMENT_MAC``)."""
    if not isinstance(payload, bytes) or len(payload) > MAX_FRAGMENT_PAYLOAD:
        raise UsageError(f"a fragment payload is at most {MAX_FRAGMENT_PAYLOAD} bytes")
    try:
        return bytes(FRAGMENT_MAC.build({
            "version": AUTH_VERSION, "direction": int(Direction(direction)), "frame_version": frame_version,
            "master": master, "terminal": terminal, "epoch": epoch, "counter": counter, "message_id": message_id,
            "flags": int(bool(final)) | int(bool(urgent)) << 1, "offset": offset, "payload": payload,
        }))  # fmt: skip
    except (ConstructError, TypeError, ValueError) as exc:  # a field out of range
        raise UsageError(f"fragment fields out of range: {exc}") from None


def mac_input_of(fragment: Fragment, *, frame_version: int, epoch: int, counter: int) -> bytes:
    """What the tag of ``fragment`` sent with ``epoch`` and ``counter`` covers:
    every field that affects how it is processed (the downlink flag as the direction)."""
    return fragment_mac_input(
        frame_version=frame_version, direction=Direction.DOWNLINK if fragment.downlink else Direction.UPLINK,
        master=fragment.master, terminal=fragment.terminal, epoch=epoch, counter=counter,
        message_id=fragment.message_id, final=fragment.final, urgent=fragment.urgent, offset=fragment.offset,
        payload=fragment.payload,
    )  # fmt: skip


def sign_fragment(key: Key, fields: bytes, tag_bytes: int = AUTH_TAG_BYTES) -> bytes:
    """The tag of a fragment whose :func:`fragment_mac_input` is ``fields``."""
    return hmac_tag(key.material, fields, tag_bytes)


def fragment_tag_matches(key: Key, fields: bytes, tag: bytes, tag_bytes: int = AUTH_TAG_BYTES) -> bool:
    """Whether ``tag`` is the fragment's tag, compared in constant time (a tag of the wrong length never is)."""
    return len(tag) == tag_bytes and tag_matches(key.material, fields, tag)
