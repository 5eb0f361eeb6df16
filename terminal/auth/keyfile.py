"""The key file: one secret on disk, with its role, terminal, epoch and a CRC-32C.

Reading a key file is reading received input: whatever the bytes, only
:class:`KeyFileError` (a :class:`~ionotrail.terminal.errors.DecodeError`)
comes out, its message saying what is wrong.  The CRC-32C refuses a file
damaged on disk or in transfer; it is no protection against someone who may
write the file (file permissions are, checked by the harness before reading).
The layout is ``KEY_FILE`` in :mod:`~ionotrail.terminal.auth.formats`;
docs/keys.md has its table.
"""

from __future__ import annotations

from construct import ConstructError
from ionotrail.terminal.auth.formats import KEY_FILE, KEY_FILE_VERSION, KEY_MAGIC, Role
from ionotrail.terminal.auth.keys import SiteSecret, TerminalRoot
from ionotrail.terminal.errors import DecodeError, Reason, UsageError
from ionotrail.terminal.wire.crc import crc32c

KEY_FILE_BYTES = KEY_FILE.sizeof()
"""Every key file is exactly this long (50 bytes)."""


class KeyFileError(DecodeError):
    """Bytes that are not a valid key file; ``reason`` says which way."""

    def __init__(self, message: str, reason: Reason = Reason.BAD_FIELD) -> None:
        super().__init__(message)
        self.reason = reason


def encode_key_file(key: SiteSecret | TerminalRoot) -> bytes:
    """The key file holding ``key``."""
    if isinstance(key, TerminalRoot):
        role, terminal, epoch = Role.TERMINAL_ROOT, key.terminal, key.epoch
    elif isinstance(key, SiteSecret):
        role, terminal, epoch = Role.SITE_SECRET, 0, 0
    else:
        raise UsageError(f"a key file holds a site secret or a terminal root, not {type(key).__name__}")
    body = {"version": KEY_FILE_VERSION, "role": int(role), "terminal": terminal, "epoch": epoch, "key": key.material}
    return bytes(KEY_FILE.build({"body": {"value": body}}))


def decode_key_file(data: bytes) -> SiteSecret | TerminalRoot:
    """The key a key file holds, or :class:`KeyFileError` saying what is wrong."""
    if not data:
        raise KeyFileError("key file is empty", Reason.TRUNCATED)
    if not data.startswith(KEY_MAGIC[: len(data)]):
        raise KeyFileError("not an ionotrail key file (its first bytes are not the key-file magic)")
    if len(data) < KEY_FILE_BYTES:
        raise KeyFileError(f"key file truncated: {len(data)} bytes of {KEY_FILE_BYTES}", Reason.TRUNCATED)
    if len(data) > KEY_FILE_BYTES:
        raise KeyFileError(f"key file too long: {len(data)} bytes, a key file is {KEY_FILE_BYTES}", Reason.TOO_LONG)
    stored, computed = int.from_bytes(data[-4:], "big"), crc32c(data[:-4])
    if stored != computed:
        # (Neither value is shown: a CRC over the key bytes tells 32 bits about the key.)
        raise KeyFileError("key file damaged: its CRC-32C does not match its contents", Reason.BAD_CRC)
    try:
        body = KEY_FILE.parse(data).body.value
    except ConstructError as exc:  # unreachable with the checks above; kept so nothing else escapes
        raise KeyFileError(f"key file unreadable: {exc}") from None
    if body.version != KEY_FILE_VERSION:
        raise KeyFileError(
            f"key file version {body.version} is not supported (this build reads version {KEY_FILE_VERSION})",
            Reason.UNSUPPORTED_VERSION,
        )
    if body.role == Role.SITE_SECRET:
        if body.terminal or body.epoch:
            raise KeyFileError("site-secret key file names a terminal or an epoch (both must be 0)")
        return SiteSecret(bytes(body.key))
    if body.role == Role.TERMINAL_ROOT:
        return TerminalRoot(bytes(body.key), body.terminal, body.epoch)
    raise KeyFileError(f"key file role {body.role} is unknown (1 site secret, 2 terminal root)")
