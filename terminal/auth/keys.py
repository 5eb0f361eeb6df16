"""The key hierarchy: one site secret, a root key per terminal and epoch, working keys per direction and purpose.

::

    site secret (32 bytes, stays at the master)
      |  HKDF-Extract(salt = LABEL, IKM = site secret), then
      |  HKDF-Expand(info = TERMINAL_ROOT, terminal, epoch 0)
      v
    terminal root, epoch 0  ----------------->  the terminal's key file
      |  HKDF-Expand(root_e, info = NEXT_ROOT, terminal, e + 1)
      v
    terminal root, epoch 1, 2, ...             (each rotation, at both ends)
      |  HKDF-Expand(root_e, info = WORKING_KEY, terminal, e, direction, purpose)
      v
    command key (downlink), reply key (uplink), data keys (each direction)

A terminal holds only its own root; a stolen terminal yields nothing about
another terminal (each root is an independent HKDF output of the site
secret) nor about its own earlier epochs (HKDF cannot be run backwards).  The
master, holding the site secret, derives any terminal's root of any epoch by
following the chain.  Every ``info`` is the fixed-width ``DERIVATION_INFO``
of :mod:`~ionotrail.terminal.auth.formats`, so no two derivations share one.
RFC 5869 s3.3 lets a key that is already uniformly random skip the extract
step; root keys are HKDF outputs, so the steps below a root only expand.
"""

from __future__ import annotations

import hmac

from ionotrail.terminal.auth.formats import DERIVATION_INFO, LABEL, Derivation, Direction, Purpose
from ionotrail.terminal.auth.primitives import hkdf_expand, hkdf_extract
from ionotrail.terminal.errors import UsageError
from ionotrail.terminal.limits import AUTH_EPOCH_BITS, AUTH_KEY_BYTES

MAX_EPOCH = (1 << AUTH_EPOCH_BITS) - 1
FINGERPRINT_BYTES = 4
"""A fingerprint names a key to a person (8 hex digits); it is an HMAC of a
fixed string under the key, so it reveals nothing that helps find the key."""


def _address(terminal: int) -> int:
    if not isinstance(terminal, int) or isinstance(terminal, bool) or not 0 <= terminal <= 0xFFFF:
        raise UsageError(f"terminal address {terminal!r} must be an integer from 0 to 0xFFFF")
    return terminal


def _epoch(epoch: int) -> int:
    if not isinstance(epoch, int) or isinstance(epoch, bool) or not 0 <= epoch <= MAX_EPOCH:
        raise UsageError(f"key epoch {epoch!r} must be an integer from 0 to {MAX_EPOCH}")
    return epoch


class Key:
    """A secret of AUTH_KEY_BYTES bytes.  Its repr shows a fingerprint, never the key."""

    __slots__ = ("_material",)

    def __init__(self, material: bytes) -> None:
        if not isinstance(material, bytes) or len(material) != AUTH_KEY_BYTES:
            raise UsageError(f"a key is {AUTH_KEY_BYTES} bytes")
        self._material = material

    @property
    def material(self) -> bytes:
        """The key itself: for HMAC, HKDF and the key file only; never print or log it."""
        return self._material

    @property
    def fingerprint(self) -> str:
        """Eight hex digits that name this key to a person (docs/keys.md)."""
        return hmac.digest(self._material, LABEL + b"fingerprint", "sha256")[:FINGERPRINT_BYTES].hex()

    def __eq__(self, other: object) -> bool:
        return isinstance(other, Key) and type(other) is type(self) and self._fields() == other._fields()

    def __hash__(self) -> int:
        return hash((type(self).__name__, self.fingerprint))

    def _fields(self) -> tuple[object, ...]:
        return (self._material,)

    def __repr__(self) -> str:
        return f"{type(self).__name__}(fingerprint={self.fingerprint})"


class SiteSecret(Key):
    """The site's master secret; it never leaves the master."""

    __slots__ = ()

    def root(self, terminal: int, epoch: int = 0) -> TerminalRoot:
        """Terminal ``terminal``'s root key of ``epoch``: epoch 0 from the site secret, then the chain."""
        terminal, epoch = _address(terminal), _epoch(epoch)
        prk = hkdf_extract(LABEL, self.material)
        info = derivation_info(Derivation.TERMINAL_ROOT, terminal, 0)
        root = TerminalRoot(hkdf_expand(prk, info, AUTH_KEY_BYTES), terminal, 0)
        for _ in range(epoch):
            root = root.next()
        return root


class TerminalRoot(Key):
    """One terminal's root key of one epoch: what that terminal is provisioned with."""

    __slots__ = ("epoch", "terminal")

    def __init__(self, material: bytes, terminal: int, epoch: int) -> None:
        super().__init__(material)
        self.terminal = _address(terminal)
        self.epoch = _epoch(epoch)

    def _fields(self) -> tuple[object, ...]:
        return (self.material, self.terminal, self.epoch)

    def next(self) -> TerminalRoot:
        """The root of the next epoch (a rotation)."""
        if self.epoch >= MAX_EPOCH:
            raise UsageError(
                f"terminal 0x{self.terminal:04x} is at the last key epoch ({MAX_EPOCH}): issue a new site secret"
            )
        info = derivation_info(Derivation.NEXT_ROOT, self.terminal, self.epoch + 1)
        return TerminalRoot(hkdf_expand(self.material, info, AUTH_KEY_BYTES), self.terminal, self.epoch + 1)

    def working_key(self, direction: Direction, purpose: Purpose) -> Key:
        """The key of one direction and purpose in this epoch."""
        info = derivation_info(
            Derivation.WORKING_KEY, self.terminal, self.epoch, Direction(direction), Purpose(purpose)
        )
        return Key(hkdf_expand(self.material, info, AUTH_KEY_BYTES))

    def __repr__(self) -> str:
        return f"TerminalRoot(terminal=0x{self.terminal:04x}, epoch={self.epoch}, fingerprint={self.fingerprint})"


def derivation_info(
    step: Derivation, terminal: int, epoch: int, direction: Direction | None = None, purpose: Purpose | None = None
) -> bytes:
    """The HKDF ``info`` of one derivation step (DERIVATION_INFO: fixed width, so unambiguous)."""
    return bytes(
        DERIVATION_INFO.build(
            {
                "step": int(step),
                "terminal": _address(terminal),
                "epoch": _epoch(epoch),
                "direction": 0 if direction is None else int(direction),
                "purpose": 0 if purpose is None else int(purpose),
            }
        )
    )
