"""A terminal that is not ours: it speaks the host-modem interface (docs/modem.md)
and builds its air frames itself (docs/wire.md), importing nothing from ionotrail.

Usage: terminal_script.py PTY_PATH TERMINAL_ADDRESS MASTER_ID MESSAGE_HEX [SECONDS]

It listens for a probe of its master, then transmits the message as one
fragment after every probe it hears, until SECONDS have passed (the master
acknowledges; a real terminal would stop on the acknowledgement, this one
stays simple and relies on the master's duplicate rejection).  It prints one
line per record it receives and exits 0 when it heard at least one probe.
"""

from __future__ import annotations

import binascii
import struct
import sys
import time

import serial

RECORD_VERSION = 1
TRANSMIT, RECEIVED = 1, 9
FRAME_VERSION, PROBE, FRAGMENT = 1, 1, 2


def crc16(data: bytes) -> int:
    """CRC-16/IBM-3740 (poly 0x1021, init 0xFFFF): binascii.crc_hqx."""
    return binascii.crc_hqx(data, 0xFFFF)


def crc32c(data: bytes) -> int:
    """CRC-32C (Castagnoli, reflected polynomial 0x82F63B78), bit by bit (RFC 3720 B.4)."""
    crc = 0xFFFFFFFF
    for byte in data:
        crc ^= byte
        for _ in range(8):
            crc = (crc >> 1) ^ 0x82F63B78 if crc & 1 else crc >> 1
    return crc ^ 0xFFFFFFFF


def cobs_encode(data: bytes) -> bytes:
    """COBS (Cheshire and Baker 1999) with a zero delimiter appended."""
    out, block = bytearray(), bytearray()
    for byte in data:
        if byte == 0:
            out += bytes([len(block) + 1]) + block
            block.clear()
        else:
            block.append(byte)
            if len(block) == 254:
                out += b"\xff" + block
                block.clear()
    out += bytes([len(block) + 1]) + block + b"\x00"
    return bytes(out)


def cobs_decode(data: bytes) -> bytes:
    out, k = bytearray(), 0
    while k < len(data):
        code = data[k]
        if code == 0 or k + code > len(data):
            raise ValueError("bad COBS")
        out += data[k + 1 : k + code]
        k += code
        if code < 0xFF and k < len(data):
            out.append(0)
    return bytes(out)


def record(kind: int, body: bytes) -> bytes:
    data = bytes([RECORD_VERSION << 4 | kind]) + body
    return cobs_encode(data + struct.pack(">H", crc16(data)))


def fragment(terminal: int, master: int, message_id: int, sealed: bytes) -> bytes:
    position = 1 << 15 | 0  # final, routine, uplink, offset 0
    data = bytes([FRAME_VERSION << 4 | FRAGMENT]) + struct.pack(">HBHH", terminal, master, message_id, position) + sealed
    return data + struct.pack(">H", crc16(data))


def main() -> int:
    path, terminal, master, message = sys.argv[1], int(sys.argv[2], 0), int(sys.argv[3], 0), bytes.fromhex(sys.argv[4])
    seconds = float(sys.argv[5]) if len(sys.argv) > 5 else 20.0
    sealed = message + struct.pack(">I", crc32c(message))
    frame = fragment(terminal, master, 0, sealed)
    line = serial.Serial(path, 115200, timeout=0.05)
    line.write(record(4, b"\x80"))  # Listen, on
    buffer, probes, sent, host_id = bytearray(), 0, 0, 0
    end = time.monotonic() + seconds
    while time.monotonic() < end:
        buffer += line.read(512)
        while b"\x00" in buffer:
            raw, _, rest = bytes(buffer).partition(b"\x00")
            buffer = bytearray(rest)
            try:
                data = cobs_decode(raw)
            except ValueError:
                continue
            if len(data) < 3 or crc16(data[:-2]) != struct.unpack(">H", data[-2:])[0]:
                print("refused a damaged record", flush=True)
                continue
            kind = data[0] & 0x0F
            print(f"record type {kind}, {len(data)} bytes", flush=True)
            if kind == RECEIVED:
                air = data[1 + 8 + 2 + 4 : -2]
                if len(air) >= 2 and air[0] == (FRAME_VERSION << 4 | PROBE) and air[1] == master:
                    probes += 1
                    line.write(record(TRANSMIT, struct.pack(">H", host_id) + frame))
                    host_id, sent = (host_id + 1) & 0xFFFF, sent + 1
    print(f"heard {probes} probes, sent {sent} fragments", flush=True)
    return 0 if probes else 1


if __name__ == "__main__":
    raise SystemExit(main())
