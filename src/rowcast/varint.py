"""Variable-length unsigned numbers, as every rowcast record writes them: 7 bits a byte,
low bits first, the high bit set on every byte but the last (see docs/FORMAT.md)."""

from __future__ import annotations

MAX_BYTES = 10  # enough for any number below 2**64


def pack(value: int) -> bytes:
    """The bytes of `value` (>= 0)."""
    out = bytearray()
    while True:
        low, value = value & 0x7F, value >> 7
        out.append(low | (0x80 if value else 0))
        if not value:
            return bytes(out)


def unpack(data: bytes, pos: int) -> tuple[int, int]:
    """The number at `pos` and the position after it. IndexError when the data ends inside
    it; ValueError when it is padded (a last byte of 0 after others) or over `MAX_BYTES`."""
    value = 0
    for i in range(MAX_BYTES):
        byte = data[pos + i]
        value |= (byte & 0x7F) << (7 * i)
        if not byte & 0x80:
            if byte == 0 and i:
                raise ValueError("padded number")
            return value, pos + i + 1
    raise ValueError("number longer than 10 bytes")
