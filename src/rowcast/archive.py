"""The archive: many compressed images in one file, each readable on its own.

Layout (docs/FORMAT.md): a header naming the model, the payloads back to back, an index
protected by CRC32, and a fixed-size trailer that locates the index. Versions 1 and 2 hold
fixed-width index records; version 3 packs them (variable-length numbers, offsets implied
by the order, the whole deflated), which matters for small images with long paths; version
4 adds the method "adaptive" (tuning with surprise gains, `rowcast.feedback`).
"""

from __future__ import annotations

import os
import string
import struct
import tempfile
import unicodedata
import zlib
from collections.abc import Iterable
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, BinaryIO

MAGIC = b"ROWCAST\xe5"
VERSION = 6  # what writers write unless told otherwise
END_MARK = b"RCIX"

MODES: dict[str, int] = {"L": 1, "RGB": 2}
METHODS: dict[str, int] = {"stored": 0, "model": 1, "tuned": 2, "adaptive": 3}

_BYTES_PER_PIXEL: dict[str, int] = {"L": 1, "RGB": 3}
_MODE_NAMES: dict[int, str] = {code: name for name, code in MODES.items()}
_METHOD_NAMES: dict[int, str] = {code: name for name, code in METHODS.items()}
# Version 2 added method 2; version 3 packed the index; version 4 added method 3;
# version 5 gave gray entries a compact tuning header; version 6 range-codes the tuning
# and trims the coder's ending.
VERSION_METHODS: dict[int, frozenset[str]] = {
    1: frozenset({"stored", "model"}), 2: frozenset({"stored", "model", "tuned"}),
    3: frozenset({"stored", "model", "tuned"}), 4: frozenset(METHODS), 5: frozenset(METHODS),
    6: frozenset(METHODS)}
PACKED_FROM = 3  # the first version with a packed index
COMPACT_FROM = 5  # the first version whose gray entries have compact tuning headers
STREAMED_FROM = 6  # the first version whose payloads are one trimmed code, tuning inside

_PREFIX = struct.Struct("<8sH")  # magic, version
_HEADER = struct.Struct("<8sHH32sB")  # magic, version, flags, model SHA-256, model name length
_CRC = struct.Struct("<I")
_TRAILER = struct.Struct("<QQI4s")  # index offset, index length, index CRC32, end mark
_COUNT = struct.Struct("<I")
_PATH_LEN = struct.Struct("<H")
_ENTRY = struct.Struct("<BBII32sQQ")  # mode, method, width, height, checksum, offset, length
_PACKED = struct.Struct("<II")  # packed index: entry count, length of the inflated records
_CODES = struct.Struct("<BB")  # mode, method

_MIN_HEADER = _HEADER.size + _CRC.size
_MIN_RECORD = _PATH_LEN.size + 1 + _ENTRY.size  # a record's path has at least one byte
_MAX_NAME_BYTES = 255
_MAX_PATH_BYTES = 2**16 - 1
_MAX_DIMENSION = 2**32 - 1
_DIGEST_BYTES = 32
# a packed record: path length, a path byte, mode, method, width, height, checksum, length
_MIN_PACKED_RECORD = 1 + 1 + _CODES.size + 1 + 1 + _DIGEST_BYTES + 1
_MAX_INFLATION = 1032  # deflate never expands more than this: a bound on honest lengths
_MAX_NUMBER_BYTES = 10  # a variable-length number below 2**64
_WORD_BYTES = 4
# bytes ahead of the coder's words (rowcast.tuning.header_bytes: the layout is fixed here
# too), and those of a gray entry from version COMPACT_FROM on
_TUNING_BYTES: dict[str, int] = {"model": 0, "tuned": 16, "adaptive": 18}
_GRAY_TUNING_BYTES: dict[str, int] = {"model": 0, "tuned": 4, "adaptive": 5}
_ASCII_LETTERS = frozenset(string.ascii_letters)


class ArchiveError(Exception):
    """Raised with a one-line message that names the file and the reason."""


class _InvalidError(Exception):
    """A reason without a file name; public functions prefix it and re-raise ArchiveError."""


@dataclass(frozen=True)
class ModelIdentity:
    """Which model coded an archive: its name and the SHA-256 of its canonical bytes."""

    name: str
    sha256: bytes


@dataclass(frozen=True)
class Entry:
    """One image as handed to the writer, payload included."""

    path: str
    mode: str
    width: int
    height: int
    method: str
    checksum: bytes
    payload: bytes


@dataclass(frozen=True)
class IndexEntry:
    """One image as listed by the reader; the payload stays on disk at offset/length."""

    path: str
    mode: str
    width: int
    height: int
    method: str
    checksum: bytes
    offset: int
    length: int
    version: int = field(default=VERSION, compare=False)  # the archive's: fixes the layout


def _is_drive_prefix(component: str) -> bool:
    """Whether a first component like "C:" or "c:x" would mean a drive on some systems."""
    return len(component) >= 2 and component[1] == ":" and component[0] in _ASCII_LETTERS


def _normalise(path: str) -> str:
    """Return the canonical form of an entry path, or raise _InvalidError with the reason."""
    text = unicodedata.normalize("NFC", path)
    for char in text:
        if char == "\\":
            raise _InvalidError("backslash in path")
        if unicodedata.category(char) in ("Cc", "Cs"):
            raise _InvalidError(f"forbidden character U+{ord(char):04X} in path")
    if text.startswith("/"):
        raise _InvalidError("absolute path")
    parts = [part for part in text.split("/") if part not in ("", ".")]
    if ".." in parts:
        raise _InvalidError("'..' component in path")
    if not parts:
        raise _InvalidError("empty path")
    if _is_drive_prefix(parts[0]):
        raise _InvalidError("drive-letter prefix in path")
    canonical = "/".join(parts)
    if len(canonical.encode("utf-8")) > _MAX_PATH_BYTES:
        raise _InvalidError(f"path longer than {_MAX_PATH_BYTES} UTF-8 bytes")
    return canonical


def normalise_path(path: str) -> str:
    """Return `path` as a canonical relative POSIX path, or raise ArchiveError saying why not."""
    try:
        return _normalise(path)
    except _InvalidError as problem:
        raise ArchiveError(f"{path!r}: {problem}") from None


def _encode_utf8(text: str, what: str) -> bytes:
    """Encode text as UTF-8, turning unencodable input (lone surrogates) into _InvalidError."""
    try:
        return text.encode("utf-8")
    except UnicodeEncodeError:
        raise _InvalidError(f"{what} is not encodable as UTF-8") from None


def _decode_utf8(data: bytes, what: str) -> str:
    """Decode UTF-8 read from a file, turning malformed bytes into _InvalidError."""
    try:
        return data.decode("utf-8")
    except UnicodeDecodeError:
        raise _InvalidError(f"{what} is not valid UTF-8") from None


def _check_dimensions(width: int, height: int) -> None:
    """Refuse image sizes that are empty or do not fit the 32-bit fields."""
    for name, value in (("width", width), ("height", height)):
        if not 1 <= value <= _MAX_DIMENSION:
            raise _InvalidError(f"{name} {value} outside 1..{_MAX_DIMENSION}")


def _check_payload_length(mode: str, method: str, width: int, height: int, length: int,
                          version: int) -> None:
    """Refuse payload lengths that cannot be right for the method (raw size; before
    version 6, whole words after the tuning header; from 6 on any length is a code)."""
    if method == "stored":
        expected = width * height * _BYTES_PER_PIXEL[mode]
        if length != expected:
            raise _InvalidError(f"stored payload is {length} bytes, expected {expected}")
    elif version < STREAMED_FROM:
        gray = mode == "L" and version >= COMPACT_FROM
        header = (_GRAY_TUNING_BYTES if gray else _TUNING_BYTES)[method]
        if length < header or (length - header) % _WORD_BYTES:
            after = f" after its {header}-byte tuning header" if header else ""
            raise _InvalidError(f"{method} payload is {length} bytes, not whole 32-bit "
                                f"words{after}")


def payload_layout(version: int) -> str:
    """How the coded payloads of a format version carry their tuning (`codec.LAYOUTS`)."""
    if version >= STREAMED_FROM:
        return "streamed"
    return "compact" if version >= COMPACT_FROM else "full"


def _check_entry(entry: Entry, version: int) -> str:
    """Validate a writer entry and return its canonical path."""
    path = _normalise(entry.path)
    if entry.mode not in MODES:
        raise _InvalidError(f"unknown mode {entry.mode!r}")
    if entry.method not in METHODS:
        raise _InvalidError(f"unknown method {entry.method!r}")
    _check_dimensions(entry.width, entry.height)
    if len(entry.checksum) != _DIGEST_BYTES:
        raise _InvalidError(f"checksum is {len(entry.checksum)} bytes, expected {_DIGEST_BYTES}")
    _check_payload_length(entry.mode, entry.method, entry.width, entry.height,
                          len(entry.payload), version)
    return path


def _encode_header(model: ModelIdentity, version: int) -> bytes:
    """Pack the header (magic, version, flags, model identity) followed by its CRC32."""
    name = _encode_utf8(model.name, "model name")
    if len(name) > _MAX_NAME_BYTES:
        raise _InvalidError(f"model name longer than {_MAX_NAME_BYTES} UTF-8 bytes")
    if len(model.sha256) != _DIGEST_BYTES:
        raise _InvalidError(f"model SHA-256 is {len(model.sha256)} bytes, expected {_DIGEST_BYTES}")
    head = _HEADER.pack(MAGIC, version, 0, model.sha256, len(name)) + name
    return head + _CRC.pack(zlib.crc32(head))


def _number(value: int) -> bytes:
    """A variable-length unsigned number: 7 bits a byte, low first, high bit = more follow."""
    out = bytearray()
    while True:
        low, value = value & 0x7F, value >> 7
        out.append(low | (0x80 if value else 0))
        if not value:
            return bytes(out)


def _encode_record(entry: Entry, path: str, offset: int, version: int) -> bytes:
    """One index record for an already validated entry whose payload starts at offset."""
    raw_path = path.encode("utf-8")
    if version >= PACKED_FROM:
        return (_number(len(raw_path)) + raw_path
                + _CODES.pack(MODES[entry.mode], METHODS[entry.method])
                + _number(entry.width) + _number(entry.height) + entry.checksum
                + _number(len(entry.payload)))
    fields = _ENTRY.pack(
        MODES[entry.mode],
        METHODS[entry.method],
        entry.width,
        entry.height,
        entry.checksum,
        offset,
        len(entry.payload),
    )
    return _PATH_LEN.pack(len(raw_path)) + raw_path + fields


def _write_body(out: BinaryIO, header: bytes, entries: Iterable[Entry], dest: Path,
                version: int) -> int:
    """Stream header, payloads, index and trailer to `out`; return the bytes written."""
    out.write(header)
    offset = len(header)
    records: list[bytes] = []
    seen: set[str] = set()
    for entry in entries:
        try:
            path = _check_entry(entry, version)
            if path in seen:
                raise _InvalidError(f"duplicate path {path!r}")
            if entry.method not in VERSION_METHODS[version]:
                raise _InvalidError(f"method {entry.method!r} needs a newer format version")
        except _InvalidError as problem:
            raise ArchiveError(f"{dest}: entry {entry.path!r}: {problem}") from None
        seen.add(path)
        records.append(_encode_record(entry, path, offset, version))
        out.write(entry.payload)
        offset += len(entry.payload)
    if version >= PACKED_FROM:
        packed = b"".join(records)
        index = _PACKED.pack(len(records), len(packed)) + zlib.compress(packed, 9)
    else:
        index = _COUNT.pack(len(records)) + b"".join(records)
    out.write(index)
    out.write(_TRAILER.pack(offset, len(index), zlib.crc32(index), END_MARK))
    return out.tell()


def _fsync_directory(directory: Path) -> None:
    """Make a rename inside `directory` durable where the platform allows syncing directories."""
    if os.name != "posix":
        return
    fd = os.open(directory, os.O_RDONLY)
    try:
        os.fsync(fd)
    finally:
        os.close(fd)


def write_archive(
    dest: Path, model: ModelIdentity, entries: Iterable[Entry], force: bool = False,
    version: int = VERSION,
) -> int:
    """Write an archive atomically, streaming payloads as `entries` yields them.

    Returns the file size. Raises ArchiveError for bad input or an existing dest without
    force. `version` may be an older format version when every entry's method exists there.
    """
    dest = Path(dest)
    if not force and (dest.exists() or dest.is_symlink()):
        raise ArchiveError(f"{dest}: already exists (pass force to overwrite)")
    if version not in VERSION_METHODS:
        raise ArchiveError(f"{dest}: cannot write format version {version}")
    try:
        header = _encode_header(model, version)
    except _InvalidError as problem:
        raise ArchiveError(f"{dest}: {problem}") from None
    fd, temp = tempfile.mkstemp(prefix=f".{dest.name}.", suffix=".tmp", dir=dest.parent)
    try:
        os.chmod(temp, _new_file_mode())  # mkstemp's 0o600 would hide it from the group
        with os.fdopen(fd, "wb") as out:
            size = _write_body(out, header, entries, dest, version)
            out.flush()
            os.fsync(out.fileno())
        os.replace(temp, dest)
    except BaseException:
        Path(temp).unlink(missing_ok=True)
        raise
    _fsync_directory(dest.parent)
    return size


def _new_file_mode() -> int:
    """The mode that open() gives a new file: 0o666 less the process's umask."""
    mask = os.umask(0o022)
    os.umask(mask)
    return 0o666 & ~mask


class _Cursor:
    """Reads index fields in order, refusing to run past the end of the index."""

    def __init__(self, data: bytes) -> None:
        """Start at the first byte of `data`."""
        self._data = data
        self._pos = 0

    def take(self, count: int) -> bytes:
        """Return the next `count` bytes, or raise _InvalidError if fewer remain."""
        end = self._pos + count
        if end > len(self._data):
            raise _InvalidError("truncated index")
        chunk = self._data[self._pos : end]
        self._pos = end
        return chunk

    def unpack(self, layout: struct.Struct) -> tuple[Any, ...]:
        """Decode the next fixed-size group of fields."""
        return layout.unpack(self.take(layout.size))

    def number(self) -> int:
        """The next variable-length number (`_number`), refusing padded or overlong ones."""
        value = 0
        for i in range(_MAX_NUMBER_BYTES):
            (byte,) = self.take(1)
            value |= (byte & 0x7F) << (7 * i)
            if not byte & 0x80:
                if byte == 0 and i:
                    raise _InvalidError("malformed number in index")
                return value
        raise _InvalidError("malformed number in index")

    def at_end(self) -> bool:
        """Whether every byte has been consumed."""
        return self._pos == len(self._data)


def _read_at(f: BinaryIO, offset: int, count: int) -> bytes:
    """Read exactly `count` bytes at `offset` (already checked against the file size)."""
    f.seek(offset)
    data = f.read(count)
    if len(data) != count:
        raise _InvalidError("truncated file")
    return data


def _check_prefix(prefix: bytes) -> int:
    """Check the magic bytes and the format version at the start of the file; return it."""
    magic = prefix[: len(MAGIC)]
    if magic != MAGIC[: len(magic)]:
        raise _InvalidError("not a rowcast archive")
    if len(prefix) < _PREFIX.size:
        raise _InvalidError("truncated file")
    version = _PREFIX.unpack(prefix)[1]
    if version not in VERSION_METHODS:
        known = ", ".join(map(str, VERSION_METHODS))
        raise _InvalidError(f"unsupported format version {version} (this reader knows {known})")
    return version


def _parse_header(header: bytes) -> ModelIdentity:
    """Check the CRC and flags of a complete header and return the model identity."""
    body, (crc,) = header[: -_CRC.size], _CRC.unpack(header[-_CRC.size :])
    if zlib.crc32(body) != crc:
        raise _InvalidError("header CRC mismatch")
    _, _, flags, digest, _ = _HEADER.unpack(body[: _HEADER.size])
    if flags:
        raise _InvalidError(f"unsupported header flags 0x{flags:04x}")
    return ModelIdentity(_decode_utf8(body[_HEADER.size :], "model name"), digest)


def _read_header(f: BinaryIO, size: int) -> tuple[ModelIdentity, int, int]:
    """Read and validate the header; return the model identity, where the header ends and
    the format version."""
    version = _check_prefix(_read_at(f, 0, min(size, _PREFIX.size)))
    if size < _MIN_HEADER + _TRAILER.size:
        raise _InvalidError("truncated file")
    name_length = _HEADER.unpack(_read_at(f, 0, _HEADER.size))[4]
    header_end = _MIN_HEADER + name_length
    if header_end + _TRAILER.size > size:
        raise _InvalidError("truncated file")
    return _parse_header(_read_at(f, 0, header_end)), header_end, version


def _parse_trailer(trailer: bytes, size: int, header_end: int) -> tuple[int, int, int]:
    """Check the trailer against the file size; return index offset, length and CRC32."""
    offset, length, crc, mark = _TRAILER.unpack(trailer)
    if mark != END_MARK:
        raise _InvalidError("missing end mark (truncated or damaged file)")
    if offset < header_end or offset + length != size - _TRAILER.size:
        raise _InvalidError("index location out of bounds")
    if length < _COUNT.size:
        raise _InvalidError("truncated index")
    return offset, length, crc


def _read_trailer(f: BinaryIO, size: int, header_end: int) -> tuple[int, int, int]:
    """Read the trailer at the end of the file and validate it."""
    return _parse_trailer(_read_at(f, size - _TRAILER.size, _TRAILER.size), size, header_end)


def _lookup(names: dict[int, str], code: int, what: str) -> str:
    """Translate a stored code to its name, refusing codes this version does not define."""
    if code not in names:
        raise _InvalidError(f"unknown {what} code {code}")
    return names[code]


def _check_record(path: str, fields: tuple[Any, ...], start: int, limit: int,
                  version: int) -> IndexEntry:
    """Validate one decoded index record whose payload must span [start, ...) within limit."""
    if _normalise(path) != path:
        raise _InvalidError("path is not in canonical form")
    mode_code, method_code, width, height, checksum, offset, length = fields
    mode = _lookup(_MODE_NAMES, mode_code, "mode")
    method = _lookup(_METHOD_NAMES, method_code, "method")
    _check_dimensions(width, height)
    _check_payload_length(mode, method, width, height, length, version)
    if offset != start:
        raise _InvalidError(f"payload offset {offset} out of place (expected {start})")
    if offset + length > limit:
        raise _InvalidError(f"payload ends at {offset + length}, past the payload area ({limit})")
    return IndexEntry(path, mode, width, height, method, checksum, offset, length, version)


def _parse_record(cursor: _Cursor, start: int, limit: int, version: int) -> IndexEntry:
    """Decode and validate the next index record (packed from version 3 on: its offset is
    where the previous payload ended)."""
    if version < PACKED_FROM:
        path = _decode_utf8(cursor.take(cursor.unpack(_PATH_LEN)[0]), "entry path")
        fields = cursor.unpack(_ENTRY)
    else:
        path_length = cursor.number()
        if path_length > _MAX_PATH_BYTES:
            raise _InvalidError(f"path length {path_length} over {_MAX_PATH_BYTES}")
        path = _decode_utf8(cursor.take(path_length), "entry path")
        codes = cursor.unpack(_CODES)
        width, height = cursor.number(), cursor.number()
        fields = (*codes, width, height, cursor.take(_DIGEST_BYTES), start, cursor.number())
    try:
        return _check_record(path, fields, start, limit, version)
    except _InvalidError as problem:
        raise _InvalidError(f"entry {path!r}: {problem}") from None


def _inflate(index: bytes) -> tuple[int, bytes]:
    """(entry count, records) of a packed index, refusing any length that does not add up
    before inflating more than an honest writer's records."""
    if len(index) < _PACKED.size:
        raise _InvalidError("truncated index")
    count, length = _PACKED.unpack_from(index)
    deflated = index[_PACKED.size :]
    if count > length // _MIN_PACKED_RECORD:
        raise _InvalidError(f"entry count {count} cannot fit in {length} bytes of records")
    if length > _MAX_INFLATION * len(deflated):
        raise _InvalidError(f"{length} bytes of records cannot come from a "
                            f"{len(deflated)}-byte packed index")
    inflater = zlib.decompressobj()
    try:  # at most one byte past the stated length (a limit of 0 would mean none)
        records = inflater.decompress(deflated, length + 1)
    except zlib.error:
        raise _InvalidError("packed index does not inflate") from None
    if len(records) != length or not inflater.eof or inflater.unused_data:
        raise _InvalidError("packed index does not inflate to its stated length")
    return count, records


def _parse_index(index: bytes, header_end: int, index_offset: int,
                 version: int) -> list[IndexEntry]:
    """Decode the whole index; payloads must tile [header_end, index_offset) in order."""
    packed = version >= PACKED_FROM
    if packed:
        count, records = _inflate(index)
        cursor = _Cursor(records)
    else:
        cursor = _Cursor(index)
        (count,) = cursor.unpack(_COUNT)
        if count > (len(index) - _COUNT.size) // _MIN_RECORD:
            raise _InvalidError(f"entry count {count} cannot fit in a {len(index)}-byte index")
    entries: list[IndexEntry] = []
    seen: set[str] = set()
    position = header_end
    for _ in range(count):
        entry = _parse_record(cursor, position, index_offset, version)
        if entry.path in seen:
            raise _InvalidError(f"duplicate path {entry.path!r}")
        seen.add(entry.path)
        entries.append(entry)
        position = entry.offset + entry.length
    if not cursor.at_end():
        raise _InvalidError("trailing bytes in index")
    if position != index_offset:
        raise _InvalidError("payloads do not end where the index begins")
    return entries


def read_index(src: Path) -> tuple[ModelIdentity, list[IndexEntry]]:
    """Read and validate an archive's header, trailer and index without touching payloads."""
    src = Path(src)
    with src.open("rb") as f:
        size = os.fstat(f.fileno()).st_size
        try:
            model, header_end, version = _read_header(f, size)
            index_offset, index_length, crc = _read_trailer(f, size, header_end)
            index = _read_at(f, index_offset, index_length)
            if zlib.crc32(index) != crc:
                raise _InvalidError("index CRC mismatch")
            entries = _parse_index(index, header_end, index_offset, version)
            for e in entries:
                if e.method not in VERSION_METHODS[version]:
                    raise _InvalidError(f"method {e.method!r} is not defined in format "
                                        f"version {version}")
            return model, entries
        except _InvalidError as problem:
            raise ArchiveError(f"{src}: {problem}") from None


def read_payload(src: Path, entry: IndexEntry) -> bytes:
    """Read one entry's payload by seeking to it, after checking it lies in the payload area."""
    src = Path(src)
    with src.open("rb") as f:
        size = os.fstat(f.fileno()).st_size
        try:
            _, header_end, _ = _read_header(f, size)
            index_offset = _read_trailer(f, size, header_end)[0]
            if entry.offset < header_end or not 0 <= entry.length <= index_offset - entry.offset:
                raise _InvalidError(
                    f"entry {entry.path!r}: payload [{entry.offset}, +{entry.length})"
                    f" outside the payload area [{header_end}, {index_offset})"
                )
            return _read_at(f, entry.offset, entry.length)
        except _InvalidError as problem:
            raise ArchiveError(f"{src}: {problem}") from None
