"""The two CRCs of the protocol, both from crcmod's C extension.

* CRC-16/IBM-3740 (poly 0x1021, init 0xFFFF, no reflection, no final XOR;
  also called CRC-16/CCITT-FALSE) closes every frame.
* CRC-32C (Castagnoli, poly 0x1EDC6F41, reflected) closes every reassembled
  message; docs/wire.md argues the choice over CRC-32/ISO-HDLC.
"""

from __future__ import annotations

import sys
from collections.abc import Callable

import crcmod.predefined

crc16: Callable[[bytes], int] = crcmod.predefined.mkPredefinedCrcFun("crc-ccitt-false")
"""CRC-16/IBM-3740 of a byte string.  It has no reflection and no final XOR,
so the CRC of a frame *with* its CRC appended big-endian is 0: receivers check
a frame in one pass without slicing off the trailer."""

crc32c: Callable[[bytes], int] = crcmod.predefined.mkPredefinedCrcFun("crc-32c")
"""CRC-32C of a byte string."""


def using_c_extension() -> bool:
    """True when crcmod runs its C extension (pure Python is about 46x slower)."""
    return bool(getattr(sys.modules["crcmod.crcmod"], "_usingExtension", False))
