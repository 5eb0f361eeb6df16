"""CRC check values from published catalogues and cross-checks against the
standard library's independent implementations."""

from __future__ import annotations

import binascii
import sys
import zlib

import crcmod.predefined
import pytest
from hypothesis import given
from hypothesis import strategies as st
from ionotrail.terminal.wire.crc import crc16, crc32c, using_c_extension

CHECK_INPUT = b"123456789"


def test_crcmod_runs_its_c_extension() -> None:
    # crcmod installs silently as pure Python when its extension fails to build.
    assert sys.modules["crcmod.crcmod"]._usingExtension is True
    assert using_c_extension()


def test_crc16_ibm_3740_check_value() -> None:
    # Check value of CRC-16/IBM-3740 (CCITT-FALSE) over "123456789": 0x29B1
    # [Williams 1993, "A painless guide to CRC error detection algorithms";
    #  the public catalogue of parametrised CRC algorithms].
    assert crc16(CHECK_INPUT) == 0x29B1


def test_crc32c_check_value() -> None:
    # Check value of CRC-32C (Castagnoli) over "123456789": 0xE3069283 [same catalogue].
    assert crc32c(CHECK_INPUT) == 0xE3069283


@pytest.mark.parametrize(
    ("data", "expected"),
    [
        # RFC 3720 (iSCSI) Appendix B.4 CRC examples; the RFC lists the CRC
        # bytes least significant first, so "aa 36 91 8a" is 0x8A9136AA.
        (bytes(32), 0x8A9136AA),
        (b"\xff" * 32, 0x62A8AB43),
        (bytes(range(32)), 0x46DD794E),
        (bytes(range(31, -1, -1)), 0x113FDB5C),  # from memory of the same appendix
    ],
)
def test_crc32c_rfc3720_vectors(data: bytes, expected: int) -> None:
    assert crc32c(data) == expected


def test_neighbouring_catalogue_entries_are_not_ours() -> None:
    # Guards against a mislabelled predefined name: KERMIT 0x2189, XMODEM 0x31C3,
    # ARC 0xBB3D, CRC-32/ISO-HDLC 0xCBF43926 [catalogue check values].
    assert crcmod.predefined.mkPredefinedCrcFun("kermit")(CHECK_INPUT) == 0x2189
    assert crcmod.predefined.mkPredefinedCrcFun("xmodem")(CHECK_INPUT) == 0x31C3
    assert crcmod.predefined.mkPredefinedCrcFun("crc-16")(CHECK_INPUT) == 0xBB3D
    assert zlib.crc32(CHECK_INPUT) == 0xCBF43926
    assert crc16(CHECK_INPUT) not in {0x2189, 0x31C3, 0xBB3D}
    assert crc32c(CHECK_INPUT) != zlib.crc32(CHECK_INPUT)


@pytest.mark.property
@given(st.binary(max_size=600))
def test_crc16_matches_binascii(data: bytes) -> None:
    # binascii.crc_hqx with initial value 0xFFFF computes CRC-16/IBM-3740.
    assert crc16(data) == binascii.crc_hqx(data, 0xFFFF)


def _crc32c_bitwise(data: bytes) -> int:
    """Bit-at-a-time CRC-32C straight from its Rocksoft parameters
    (poly 0x1EDC6F41 reflected = 0x82F63B78, init and xorout 0xFFFFFFFF)."""
    crc = 0xFFFFFFFF
    for byte in data:
        crc ^= byte
        for _ in range(8):
            crc = (crc >> 1) ^ (0x82F63B78 if crc & 1 else 0)
    return crc ^ 0xFFFFFFFF


@pytest.mark.property
@given(st.binary(max_size=300))
def test_crc32c_matches_parameter_definition(data: bytes) -> None:
    assert crc32c(data) == _crc32c_bitwise(data)


@pytest.mark.property
@given(st.binary(max_size=300))
def test_crc16_residue_of_a_closed_frame_is_zero(data: bytes) -> None:
    # No reflection and no final XOR: appending the CRC big-endian leaves a
    # zero remainder (the receiver's one-pass check relies on it).
    assert crc16(data + crc16(data).to_bytes(2, "big")) == 0
