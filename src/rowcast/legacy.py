"""Archives of formats 1 to 6, read forever and never written again (docs/FORMAT.md,
"Legacy formats 1-6").

Versions 1 and 2 hold fixed-width index records; version 3 packs them (variable-length
numbers, offsets implied by the order, the whole deflated); version 4 adds the method
"adaptive", version 5 gives gray entries compact tuning headers, version 6 makes a coded
payload one range code. Entries come back in format 7's `IndexEntry` shape: kind "image",
format "L" or "RGB", the old method names ("stored" as "literal"), no extras, and `layout`
saying how their coded payloads carry the tuning (`payload_layout`). `rowcast.archive`
dispatches here on the version it finds.
"""

from __future__ import annotations

import struct
import zlib
from typing import Any, BinaryIO

from rowcast.archive import (
    DIGEST_BYTES,
    MAX_INFLATION,
    MAX_PATH_BYTES,
    TRAILER,
    IndexEntry,
    Malformed,
    ModelIdentity,
    check_pixels,
    decode_utf8,
    read_at,
    read_number,
    read_trailer,
    stored_path,
)

FORMATS: dict[int, tuple[str, int]] = {1: ("L", 1), 2: ("RGB", 3)}  # code -> name, planes
# The old method codes, under format 7's names ("stored" is "literal").
METHODS: dict[int, str] = {0: "literal", 1: "model", 2: "tuned", 3: "adaptive"}
# Version 2 added method 2; version 3 packed the index; version 4 added method 3;
# version 5 gave gray entries a compact tuning header; version 6 range-codes the tuning
# and trims the coder's ending.
VERSION_METHODS: dict[int, frozenset[str]] = {
    1: frozenset({"literal", "model"}), 2: frozenset({"literal", "model", "tuned"}),
    3: frozenset({"literal", "model", "tuned"}), 4: frozenset(METHODS.values()),
    5: frozenset(METHODS.values()), 6: frozenset(METHODS.values())}
PACKED_FROM = 3  # the first version with a packed index
COMPACT_FROM = 5  # the first version whose gray entries have compact tuning headers
STREAMED_FROM = 6  # the first version whose payloads are one trimmed code, tuning inside

_HEADER = struct.Struct("<8sHH32sB")  # magic, version, flags, model SHA-256, name length
_CRC = struct.Struct("<I")
_COUNT = struct.Struct("<I")
_PATH_LEN = struct.Struct("<H")
_ENTRY = struct.Struct("<BBII32sQQ")  # mode, method, width, height, checksum, offset, length
_PACKED = struct.Struct("<II")  # packed index: entry count, length of the inflated records
_CODES = struct.Struct("<BB")  # mode, method

_MIN_HEADER = _HEADER.size + _CRC.size
_MIN_RECORD = _PATH_LEN.size + 1 + _ENTRY.size  # a record's path has at least one byte
# a packed record: path length, a path byte, mode, method, width, height, checksum, length
_MIN_PACKED_RECORD = 1 + 1 + _CODES.size + 1 + 1 + DIGEST_BYTES + 1
_WORD_BYTES = 4
# bytes ahead of the coder's words before version 6, and those of a gray entry from
# version COMPACT_FROM on (rowcast.tuning's header layout)
_TUNING_BYTES: dict[str, int] = {"model": 0, "tuned": 16, "adaptive": 18}
_GRAY_TUNING_BYTES: dict[str, int] = {"model": 0, "tuned": 4, "adaptive": 5}


def payload_layout(version: int) -> str:
    """How the coded payloads of a format version carry their tuning (`codec.LAYOUTS`)."""
    if version >= STREAMED_FROM:
        return "streamed"
    return "compact" if version >= COMPACT_FROM else "full"


class _Cursor:
    """Reads index fields in order, refusing to run past the end of the index."""

    def __init__(self, data: bytes) -> None:
        """Start at the first byte of `data`."""
        self._data = data
        self._pos = 0

    def take(self, count: int) -> bytes:
        """Return the next `count` bytes, or raise Malformed if fewer remain."""
        end = self._pos + count
        if end > len(self._data):
            raise Malformed("truncated index")
        chunk = self._data[self._pos : end]
        self._pos = end
        return chunk

    def unpack(self, layout: struct.Struct) -> tuple[Any, ...]:
        """Decode the next fixed-size group of fields."""
        return layout.unpack(self.take(layout.size))

    def number(self) -> int:
        """The next variable-length number, refusing padded or overlong ones."""
        try:
            value, self._pos = read_number(self._data, self._pos)
        except IndexError:
            raise Malformed("truncated index") from None
        except Malformed:
            raise Malformed("malformed number in index") from None
        return value

    def at_end(self) -> bool:
        """Whether every byte has been consumed."""
        return self._pos == len(self._data)


def _read_header(f: BinaryIO, size: int) -> tuple[ModelIdentity, int]:
    """Read and check a legacy header; return the model identity and where it ends."""
    if size < _MIN_HEADER + TRAILER.size:
        raise Malformed("truncated file")
    name_length = _HEADER.unpack(read_at(f, 0, _HEADER.size))[4]
    header_end = _MIN_HEADER + name_length
    if header_end + TRAILER.size > size:
        raise Malformed("truncated file")
    header = read_at(f, 0, header_end)
    body, (crc,) = header[: -_CRC.size], _CRC.unpack(header[-_CRC.size :])
    if zlib.crc32(body) != crc:
        raise Malformed("header CRC mismatch")
    _, _, flags, digest, _ = _HEADER.unpack(body[: _HEADER.size])
    if flags:
        raise Malformed(f"unsupported header flags 0x{flags:04x}")
    return ModelIdentity(decode_utf8(body[_HEADER.size :], "model name"), digest), header_end


def _lookup(names: dict[int, Any], code: int, what: str) -> Any:
    """Translate a stored code, refusing codes the old formats do not define."""
    if code not in names:
        raise Malformed(f"unknown {what} code {code}")
    return names[code]


def _check_payload_length(planes: int, method: str, width: int, height: int, length: int,
                          version: int) -> None:
    """Refuse payload lengths that cannot be right for the method (raw size; before
    version 6, whole words after the tuning header; from 6 on any length is a code)."""
    if method == "literal":
        expected = width * height * planes
        if length != expected:
            raise Malformed(f"stored payload is {length} bytes, expected {expected}")
    elif version < STREAMED_FROM:
        gray = planes == 1 and version >= COMPACT_FROM
        header = (_GRAY_TUNING_BYTES if gray else _TUNING_BYTES)[method]
        if length < header or (length - header) % _WORD_BYTES:
            after = f" after its {header}-byte tuning header" if header else ""
            raise Malformed(f"{method} payload is {length} bytes, not whole 32-bit "
                            f"words{after}")


def _entry(raw_path: bytes, fields: tuple[Any, ...], start: int, limit: int, version: int,
           pixel_limit: int) -> IndexEntry:
    """Check one decoded record whose payload must span [start, ...) within limit."""
    path = stored_path(raw_path, "entry path")
    try:
        mode_code, method_code, width, height, checksum, offset, length = fields
        mode, planes = _lookup(FORMATS, mode_code, "mode")
        method = _lookup(METHODS, method_code, "method")
        if method not in VERSION_METHODS[version]:
            raise Malformed(f"method {method!r} is not defined in format version {version}")
        check_pixels(width, height, planes, pixel_limit)
        _check_payload_length(planes, method, width, height, length, version)
        if offset != start:
            raise Malformed(f"payload offset {offset} out of place (expected {start})")
        if offset + length > limit:
            raise Malformed(f"payload ends at {offset + length}, past the payload area "
                            f"({limit})")
    except Malformed as problem:
        raise Malformed(f"entry {path!r}: {problem}") from None
    return IndexEntry(path, "image", mode, width, height, method, checksum, offset, length,
                      version=version, layout=payload_layout(version))


def _record(cursor: _Cursor, start: int, limit: int, version: int,
            pixel_limit: int) -> IndexEntry:
    """Decode and check the next index record (packed from version 3 on: its offset is
    where the previous payload ended)."""
    if version < PACKED_FROM:
        raw_path = cursor.take(cursor.unpack(_PATH_LEN)[0])
        fields = cursor.unpack(_ENTRY)
    else:
        path_length = cursor.number()
        if path_length > MAX_PATH_BYTES:
            raise Malformed(f"path length {path_length} over {MAX_PATH_BYTES}")
        raw_path = cursor.take(path_length)
        codes = cursor.unpack(_CODES)
        width, height = cursor.number(), cursor.number()
        fields = (*codes, width, height, cursor.take(DIGEST_BYTES), start, cursor.number())
    return _entry(raw_path, fields, start, limit, version, pixel_limit)


def _inflate(index: bytes) -> tuple[int, bytes]:
    """(entry count, records) of a packed index, refusing any length that does not add up
    before inflating more than an honest writer's records."""
    if len(index) < _PACKED.size:
        raise Malformed("truncated index")
    count, length = _PACKED.unpack_from(index)
    deflated = index[_PACKED.size :]
    if count > length // _MIN_PACKED_RECORD:
        raise Malformed(f"entry count {count} cannot fit in {length} bytes of records")
    if length > MAX_INFLATION * len(deflated):
        raise Malformed(f"{length} bytes of records cannot come from a "
                        f"{len(deflated)}-byte packed index")
    inflater = zlib.decompressobj()
    try:  # at most one byte past the stated length (a limit of 0 would mean none)
        records = inflater.decompress(deflated, length + 1)
    except zlib.error:
        raise Malformed("packed index does not inflate") from None
    if len(records) != length or not inflater.eof or inflater.unused_data:
        raise Malformed("packed index does not inflate to its stated length")
    return count, records


def _entries(index: bytes, header_end: int, index_offset: int, version: int,
             pixel_limit: int) -> list[IndexEntry]:
    """Decode the whole index; payloads must tile [header_end, index_offset) in order."""
    if version >= PACKED_FROM:
        count, records = _inflate(index)
        cursor = _Cursor(records)
    else:
        cursor = _Cursor(index)
        (count,) = cursor.unpack(_COUNT)
        if count > (len(index) - _COUNT.size) // _MIN_RECORD:
            raise Malformed(f"entry count {count} cannot fit in a {len(index)}-byte index")
    entries: list[IndexEntry] = []
    seen: set[str] = set()
    position = header_end
    for _ in range(count):
        entry = _record(cursor, position, index_offset, version, pixel_limit)
        if entry.path in seen:
            raise Malformed(f"duplicate path {entry.path!r}")
        seen.add(entry.path)
        entries.append(entry)
        position = entry.offset + entry.length
    if not cursor.at_end():
        raise Malformed("trailing bytes in index")
    if position != index_offset:
        raise Malformed("payloads do not end where the index begins")
    return entries


def _index_location(f: BinaryIO, size: int) -> tuple[ModelIdentity, int, int, int, int]:
    """The model, the header's end and the index's offset, length and CRC32."""
    model, header_end = _read_header(f, size)
    offset, length, crc = read_trailer(f, size, header_end)
    if length < _COUNT.size:
        raise Malformed("truncated index")
    return model, header_end, offset, length, crc


def read(f: BinaryIO, size: int, version: int,
         pixel_limit: int) -> tuple[ModelIdentity, list[IndexEntry]]:
    """Read and check the header, trailer and index of a format 1-6 archive (its version
    already read from the file); Malformed says what is wrong."""
    model, header_end, offset, length, crc = _index_location(f, size)
    index = read_at(f, offset, length)
    if zlib.crc32(index) != crc:
        raise Malformed("index CRC mismatch")
    return model, _entries(index, header_end, offset, version, pixel_limit)


def payload_area(f: BinaryIO, size: int) -> tuple[int, int]:
    """Where the payloads of a format 1-6 archive start and end (header and trailer
    checked)."""
    _, header_end, offset, _, _ = _index_location(f, size)
    return header_end, offset
