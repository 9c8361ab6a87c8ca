"""The archive: many entries in one file, each readable on its own (format 7).

Layout (docs/FORMAT.md): a header of tagged fields naming the model, each entry's payload
and extras back to back, a deflated index protected by CRC32, and a fixed-size trailer
that locates the index. Index records and the header carry tagged fields whose tag says
whether a reader may ignore them, so later versions can add fields that older readers
skip. The container never looks inside payloads: a method is a name, like a compressor id.
Archives of formats 1-6 are read by `rowcast.legacy` (never written).
"""

from __future__ import annotations

import os
import re
import secrets
import struct
import tempfile
import unicodedata
import zlib
from collections.abc import Iterable, Iterator
from dataclasses import dataclass, field
from pathlib import Path
from typing import BinaryIO

from rowcast import varint
from rowcast.pixelformats import BY_CODE, BY_NAME

MAGIC = b"ROWCAST\xe5"
VERSION = 7
END_MARK = b"RCIX"
DEFAULT_PIXEL_LIMIT = 2**28  # subpixels (width x height x planes) of one declared image
DEFAULT_ENTRY_LIMIT = 2**21  # entries read_index holds at once (about 0.8 GB of them)

IMAGE, FILE, LEFT_OUT = "image", "file", "left out"
KINDS: dict[str, int] = {IMAGE: 1, FILE: 2, LEFT_OUT: 3}
# One table of method names and codes: an entry's method, and a coded entry's parts.
METHODS: dict[str, int] = {"literal": 1, "coded": 2, "png": 3, "bytes": 4, "none": 5,
                           "model": 6, "tuned": 7, "adaptive": 8, "zlib": 9, "difference": 10}
KIND_METHODS: dict[str, frozenset[str]] = {
    IMAGE: frozenset({"coded", "png", "literal"}), FILE: frozenset({"bytes"}),
    LEFT_OUT: frozenset({"none"})}
PART_METHODS = frozenset({"literal", "model", "tuned", "adaptive", "zlib", "difference"})

# Header field tags and record extension tags: odd = a reader must understand it.
MODEL_SHA256_TAG, MODEL_NAME_TAG, MODEL_FILE_TAG, MODEL_PACKED_TAG = 1, 2, 3, 5
RESTORE_AS_TAG, REASON_TAG, CARRIES_TAG, PARTS_TAG = 1, 2, 4, 6

TRAILER = struct.Struct("<QQI4s")  # index offset, index length, index CRC32, end mark
PREFIX = struct.Struct("<8sH")  # magic, version
_CRC = struct.Struct("<I")

MAX_NAME_BYTES = 255  # the model name; and each path component
MAX_MODEL_BYTES = 2**24  # an embedded model file
MAX_PATH_BYTES = 2**16 - 1
MAX_DIMENSION = 2**32 - 1
DIGEST_BYTES = 32
MAX_INFLATION = 1032  # deflate never expands more than this: a bound on honest lengths
MAX_INDEX_BYTES = 2**32  # inflated index records, whatever the deflated size
MAX_EXTENSIONS = 255  # extension fields in one record
MAX_FIELD_BYTES = 2**16 - 1  # the value of one extension field
_MAX_NUMBER_BYTES = varint.MAX_BYTES
# path length, a path byte, kind, format, width, height, method, checksum, payload length,
# extras length, extension count
_MIN_RECORD = 10 + DIGEST_BYTES
_CHUNK = 1 << 20  # bytes read or inflated at a time

_KIND_NAMES = {code: name for name, code in KINDS.items()}
_METHOD_NAMES = {code: name for name, code in METHODS.items()}
# format code -> (name, planes, bytes a value in a literal payload); 1-bit keeps a byte
_FORMATS = {code: (f.name, f.planes, 2 if f.bits == 16 else 1) for code, f in BY_CODE.items()}
_FAST_METHODS = {METHODS[m]: m for m in ("coded", "png")}  # image methods of any length
_NO_CHECKSUM = bytes(DIGEST_BYTES)
# ASCII characters that a canonical path never holds (`canonical`).
_ASCII_SPECIAL = re.compile(rb"[\x00-\x1f\x7f\\]")


class ArchiveError(Exception):
    """Raised with a one-line message that names the file and the reason."""


class Malformed(Exception):
    """A reason without a file name (here and in `rowcast.legacy`); the public functions
    prefix the file and raise ArchiveError."""


@dataclass(frozen=True)
class ModelIdentity:
    """Which model coded an archive: its name and the SHA-256 of its canonical bytes, and
    the model itself when the archive carries it (`embedded`, opaque to the container): a
    model file, or with `packed` the model in `rowcast.modelpack`'s form."""

    name: str
    sha256: bytes
    embedded: bytes = field(default=b"", repr=False)
    packed: bool = False


@dataclass(frozen=True)
class Entry:
    """One entry as handed to the writer, payload and extras included.

    Images have a pixel format name, width and height; files kept as bytes and files left
    out have format "" and size 0 x 0.
    """

    path: str
    kind: str
    format: str
    width: int
    height: int
    method: str
    checksum: bytes
    payload: bytes
    extras: bytes = b""
    restore_as: str | None = None
    reason: str = ""
    carries: tuple[str, ...] = ()
    parts: tuple[str, ...] = ()


@dataclass(frozen=True, slots=True)
class IndexEntry:
    """One entry as listed by the reader: the payload stays on disk at offset/length, its
    extras right after it (extras_length bytes)."""

    path: str
    kind: str
    format: str
    width: int
    height: int
    method: str
    checksum: bytes
    offset: int
    length: int
    extras_length: int = 0
    restore_as: str | None = None
    reason: str = ""
    carries: tuple[str, ...] = ()
    parts: tuple[str, ...] = ()
    version: int = field(default=VERSION, compare=False)  # the archive's format version
    layout: str = field(default="streamed", compare=False)  # coded payloads' layout

    @property
    def restored_path(self) -> str:
        """The name this entry restores under."""
        return self.restore_as or self.path


def _is_drive_prefix(component: str) -> bool:
    """Whether a first component like "C:" or "c:x" would mean a drive on some systems."""
    return len(component) >= 2 and component[1] == ":" and component[0].isascii() \
        and component[0].isalpha()


def canonical(path: str) -> str:
    """Return the canonical form of an entry path, or raise Malformed with the reason."""
    text = unicodedata.normalize("NFC", path)
    for char in text:
        if char == "\\":
            raise Malformed("backslash in path")
        if unicodedata.category(char) in ("Cc", "Cs"):
            raise Malformed(f"forbidden character U+{ord(char):04X} in path")
    if text.startswith("/"):
        raise Malformed("absolute path")
    parts = [part for part in text.split("/") if part not in ("", ".")]
    if ".." in parts:
        raise Malformed("'..' component in path")
    if not parts:
        raise Malformed("empty path")
    if _is_drive_prefix(parts[0]):
        raise Malformed("drive-letter prefix in path")
    result = "/".join(parts)
    if len(result.encode("utf-8")) > MAX_PATH_BYTES:
        raise Malformed(f"path longer than {MAX_PATH_BYTES} UTF-8 bytes")
    return result


def normalise_path(path: str) -> str:
    """Return `path` as a canonical relative POSIX path, or raise ArchiveError saying why not."""
    try:
        return canonical(path)
    except Malformed as problem:
        raise ArchiveError(f"{path!r}: {problem}") from None


def stored_path(raw: bytes, what: str = "path") -> str:
    """Decode a path read from a file and refuse it unless it is canonical."""
    if (raw.isascii() and raw[:1] not in b"/." and raw[-1:] != b"/" and raw[1:2] != b":"
            and b"//" not in raw and b"/." not in raw and not _ASCII_SPECIAL.search(raw)):
        return raw.decode("ascii")  # canonical as it is: no character loop needed
    path = decode_utf8(raw, what)
    if canonical(path) != path:
        raise Malformed(f"{what} is not in canonical form")
    return path


def decode_utf8(data: bytes, what: str) -> str:
    """Decode UTF-8 read from a file, turning malformed bytes into Malformed."""
    try:
        return data.decode("utf-8")
    except UnicodeDecodeError:
        raise Malformed(f"{what} is not valid UTF-8") from None


def _encode_utf8(text: str, what: str) -> bytes:
    """Encode text as UTF-8, turning unencodable input (lone surrogates) into Malformed."""
    try:
        return text.encode("utf-8")
    except UnicodeEncodeError:
        raise Malformed(f"{what} is not encodable as UTF-8") from None


def _check_text(text: str, what: str) -> str:
    """Refuse text for people (model name, reason, kinds) that holds control characters."""
    if not text.isprintable() and any(unicodedata.category(c) == "Cc" for c in text):
        raise Malformed(f"control character in {what}")
    return text


def check_pixels(width: int, height: int, planes: int, pixel_limit: int) -> None:
    """Refuse image sizes that are empty, do not fit 32 bits or exceed the subpixel limit."""
    for name, value in (("width", width), ("height", height)):
        if not 1 <= value <= MAX_DIMENSION:
            raise Malformed(f"{name} {value} outside 1..{MAX_DIMENSION}")
    if width * height * planes > pixel_limit:
        raise Malformed(f"{width} x {height} x {planes} subpixels exceed the limit of "
                        f"{pixel_limit}")


def _fold(name: str) -> str:
    """A restored name as a case-insensitive file system may see it: case-folded, NFC."""
    return unicodedata.normalize("NFC", name.casefold())


def _check_components(name: str) -> None:
    """Refuse a path with a component longer than file systems allow."""
    raw = name.encode("utf-8")
    if len(raw) > MAX_NAME_BYTES and any(len(c) > MAX_NAME_BYTES for c in raw.split(b"/")):
        raise Malformed(f"entry {name!r}: a path component is over {MAX_NAME_BYTES} "
                        "UTF-8 bytes")


class _Names:
    """The restored names seen so far, case-folded: no two entries may restore to one name,
    and no entry to a name that another needs as a directory."""

    def __init__(self) -> None:
        """Start with no names."""
        self._files: dict[str, str] = {}  # folded name -> entry path
        self._dirs: dict[str, str] = {}  # folded directory -> the first entry under it

    def add(self, path: str, restore_as: str | None) -> None:
        """Record one entry, or raise Malformed naming it and the entry it clashes with."""
        restored = restore_as or path
        for name in (path, restore_as):
            if name and len(name) > MAX_NAME_BYTES // 4:  # else no component can be too long
                _check_components(name)
        key = restored.lower() if restored.isascii() else _fold(restored)
        if key == restored:
            key = restored  # one string object kept, not two
        files, dirs = self._files, self._dirs
        if key in files:
            raise Malformed(f"entries {files[key]!r} and {path!r} restore to the same name")
        if key in dirs:
            raise Malformed(f"entry {path!r} restores to a name that entry {dirs[key]!r} "
                            "needs as a directory")
        cut = key.rfind("/")
        while cut > 0:
            parent = key[:cut]
            if parent in dirs:
                break  # its own parents were checked when it was added
            if parent in files:
                raise Malformed(f"entry {path!r} needs as a directory the name that entry "
                                f"{files[parent]!r} restores to")
            dirs[parent] = path
            cut = key.rfind("/", 0, cut)
        files[key] = path


def read_number(data: bytes, pos: int) -> tuple[int, int]:
    """The number (`varint`) at `pos` and the position after it; IndexError when the data
    ends inside it, Malformed when it is padded or longer than 10 bytes."""
    try:
        return varint.unpack(data, pos)
    except ValueError:
        raise Malformed("malformed number") from None


def read_at(f: BinaryIO, offset: int, count: int) -> bytes:
    """Read exactly `count` bytes at `offset` (already checked against the file size)."""
    f.seek(offset)
    data = f.read(count)
    if len(data) != count:
        raise Malformed("truncated file")
    return data


# ---------------------------------------------------------------------------- writing


def _encode_header(model: ModelIdentity) -> bytes:
    """Magic, version, the model's fields, the end tag and the header CRC32."""
    name = _encode_utf8(_check_text(model.name, "model name"), "model name")
    if len(name) > MAX_NAME_BYTES:
        raise Malformed(f"model name longer than {MAX_NAME_BYTES} UTF-8 bytes")
    if len(model.sha256) != DIGEST_BYTES:
        raise Malformed(f"model SHA-256 is {len(model.sha256)} bytes, expected {DIGEST_BYTES}")
    if len(model.embedded) > MAX_MODEL_BYTES:
        raise Malformed(f"embedded model of {len(model.embedded)} bytes, over {MAX_MODEL_BYTES}")
    tag = MODEL_PACKED_TAG if model.packed else MODEL_FILE_TAG
    embedded = _field(tag, model.embedded) if model.embedded else b""
    head = (PREFIX.pack(MAGIC, VERSION)
            + _field(MODEL_SHA256_TAG, bytes(model.sha256)) + _field(MODEL_NAME_TAG, name)
            + embedded + b"\0")
    return head + _CRC.pack(zlib.crc32(head))


def _field(tag: int, value: bytes) -> bytes:
    """One tagged field: tag, length, value."""
    return varint.pack(tag) + varint.pack(len(value)) + value


def _check_image(entry: Entry) -> None:
    """Refuse an image entry whose format, size, literal payload or parts are wrong."""
    fmt = BY_NAME.get(entry.format)
    if fmt is None:
        raise Malformed(f"unknown pixel format {entry.format!r}")
    check_pixels(entry.width, entry.height, fmt.planes, DEFAULT_PIXEL_LIMIT)
    if entry.method == "literal":
        expected = entry.width * entry.height * fmt.planes * _FORMATS[fmt.code][2]
        if len(entry.payload) != expected:
            raise Malformed(f"literal payload is {len(entry.payload)} bytes, expected "
                            f"{expected}")
    if entry.parts and entry.method != "coded":
        raise Malformed(f"parts given for method {entry.method!r} (only 'coded' has parts)")
    for part in entry.parts:
        if part not in PART_METHODS:
            raise Malformed(f"unknown part method {part!r}")


def _check_other(entry: Entry) -> None:
    """Refuse a file or left-out entry with an image's fields, or left out with data."""
    if entry.format or entry.width or entry.height:
        raise Malformed(f"a {entry.kind} entry has no pixel format or size")
    if entry.parts:
        raise Malformed(f"a {entry.kind} entry has no parts")
    if entry.kind == LEFT_OUT and (entry.payload or entry.extras):
        raise Malformed("a left-out entry has no payload or extras")
    if entry.kind == LEFT_OUT and entry.checksum != _NO_CHECKSUM:
        raise Malformed("a left-out entry's checksum is all zeros")


def _extensions(entry: Entry, restore_as: str | None) -> list[tuple[int, bytes]]:
    """The entry's extension fields in tag order, empty ones left out."""
    fields = []
    if restore_as is not None:
        fields.append((RESTORE_AS_TAG, restore_as.encode("utf-8")))
    if entry.reason:
        fields.append((REASON_TAG, _encode_utf8(_check_text(entry.reason, "reason"), "reason")))
    if entry.carries:
        for kind in entry.carries:
            if not kind or "\n" in kind:
                raise Malformed(f"extras kind {kind!r} is empty or holds a line break")
            _check_text(kind, "extras kind")
        fields.append((CARRIES_TAG, _encode_utf8("\n".join(entry.carries), "extras kind")))
    if entry.parts:
        fields.append((PARTS_TAG, bytes(METHODS[p] for p in entry.parts)))
    for tag, value in fields:
        if len(value) > MAX_FIELD_BYTES:
            raise Malformed(f"extension field {tag} of {len(value)} bytes, over "
                            f"{MAX_FIELD_BYTES}")
    return fields


def _encode_entry(entry: Entry) -> tuple[str, str | None, bytes]:
    """Validate a writer entry; return its canonical path, restore_as and index record."""
    path = canonical(entry.path)
    if entry.kind not in KINDS:
        raise Malformed(f"unknown kind {entry.kind!r}")
    if entry.method not in METHODS:
        raise Malformed(f"unknown method {entry.method!r}")
    if entry.method not in KIND_METHODS[entry.kind]:
        raise Malformed(f"method {entry.method!r} does not suit an entry of kind {entry.kind!r}")
    if len(entry.checksum) != DIGEST_BYTES:
        raise Malformed(f"checksum is {len(entry.checksum)} bytes, expected {DIGEST_BYTES}")
    (_check_image if entry.kind == IMAGE else _check_other)(entry)
    restore_as = None if entry.restore_as is None else canonical(entry.restore_as)
    if restore_as == path:
        restore_as = None
    extensions = _extensions(entry, restore_as)
    raw_path = path.encode("utf-8")
    fmt = BY_NAME[entry.format].code if entry.kind == IMAGE else 0
    record = b"".join([
        varint.pack(len(raw_path)), raw_path, varint.pack(KINDS[entry.kind]), varint.pack(fmt),
        varint.pack(entry.width), varint.pack(entry.height), varint.pack(METHODS[entry.method]),
        bytes(entry.checksum), varint.pack(len(entry.payload)), varint.pack(len(entry.extras)),
        varint.pack(len(extensions)), *(_field(tag, value) for tag, value in extensions)])
    return path, restore_as, record


def _write_body(out: BinaryIO, header: bytes, entries: Iterable[Entry], dest: Path) -> int:
    """Stream header, payloads and extras, then the index and trailer; return the size."""
    out.write(header)
    offset = len(header)
    deflater = zlib.compressobj(9)
    deflated: list[bytes] = []
    count = inflated = 0
    names = _Names()
    for entry in entries:
        try:
            path, restore_as, record = _encode_entry(entry)
        except Malformed as problem:
            raise ArchiveError(f"{dest}: entry {entry.path!r}: {problem}") from None
        try:
            names.add(path, restore_as)
        except Malformed as problem:
            raise ArchiveError(f"{dest}: {problem}") from None
        deflated.append(deflater.compress(record))
        count += 1
        inflated += len(record)
        out.write(entry.payload)
        out.write(entry.extras)
        offset += len(entry.payload) + len(entry.extras)
    if inflated > MAX_INDEX_BYTES:
        raise ArchiveError(f"{dest}: index of {inflated} bytes over {MAX_INDEX_BYTES}")
    deflated.append(deflater.flush())
    index = varint.pack(count) + varint.pack(inflated) + b"".join(deflated)
    out.write(index)
    out.write(TRAILER.pack(offset, len(index), zlib.crc32(index), END_MARK))
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


def _new_file_mode() -> int:
    """The mode that open() gives a new file: 0o666 less the process's umask."""
    mask = os.umask(0o022)
    os.umask(mask)
    return 0o666 & ~mask


def _unnamed_file(dest: Path) -> tuple[int, str | None]:
    """A new file beside `dest` to write the archive into: unnamed where Linux allows it
    (O_TMPFILE), so that even SIGKILL leaves nothing behind, else a hidden temporary
    file (its name is returned)."""
    if hasattr(os, "O_TMPFILE") and Path("/proc/self/fd").is_dir():
        try:
            return os.open(dest.parent, os.O_TMPFILE | os.O_WRONLY, _new_file_mode()), None
        except OSError:
            pass  # a file system without unnamed files
    fd, temp = tempfile.mkstemp(prefix=f".{dest.name}.", suffix=".tmp", dir=dest.parent)
    os.chmod(temp, _new_file_mode())  # mkstemp's 0o600 would hide it from the group
    return fd, temp


def _link_named(fd: int, dest: Path) -> str:
    """Give the unnamed file open at `fd` a new hidden name beside `dest`; that name.
    (A directory fd makes os.link call linkat with AT_SYMLINK_FOLLOW, which the /proc
    link of an unnamed file needs; the path is absolute, so which directory is moot.)"""
    root = os.open("/", os.O_RDONLY)
    try:
        for _ in range(100):
            temp = str(dest.parent / f".{dest.name}.{secrets.token_hex(4)}.tmp")
            try:
                os.link(f"/proc/self/fd/{fd}", temp, src_dir_fd=root)
                return temp
            except FileExistsError:
                continue
    finally:
        os.close(root)
    raise FileExistsError(f"{dest.parent}: no free temporary name")


def write_archive(dest: Path, model: ModelIdentity, entries: Iterable[Entry],
                  force: bool = False) -> int:
    """Write a format-7 archive atomically, streaming payloads as `entries` yields them.

    Returns the file size. Raises ArchiveError for what a reader would refuse (entries
    checked as `read_index` checks records, with the default pixel limit), a dest that is
    a symbolic link, or an existing dest without force; on any failure dest is left as it
    was. A restore_as equal to the canonical path is not stored.
    """
    dest = Path(dest)
    if dest.is_symlink():
        raise ArchiveError(f"{dest}: is a symbolic link (not written through)")
    if not force and dest.exists():
        raise ArchiveError(f"{dest}: already exists (pass force to overwrite)")
    try:
        header = _encode_header(model)
    except Malformed as problem:
        raise ArchiveError(f"{dest}: {problem}") from None
    fd, temp = _unnamed_file(dest)
    try:
        with os.fdopen(fd, "wb", closefd=False) as out:
            size = _write_body(out, header, entries, dest)
            out.flush()
            os.fsync(fd)
        if temp is None:  # give the unnamed file a name only now, then move it into place
            temp = _link_named(fd, dest)
        os.replace(temp, dest)
    except BaseException:
        if temp is not None:
            Path(temp).unlink(missing_ok=True)
        raise
    finally:
        os.close(fd)
    _fsync_directory(dest.parent)
    return size


# ---------------------------------------------------------------------------- reading


def _read_version(f: BinaryIO, size: int) -> int:
    """Check the magic and return the format version (1 to VERSION)."""
    prefix = read_at(f, 0, min(size, PREFIX.size))
    if prefix[: len(MAGIC)] != MAGIC[: len(prefix)]:
        raise Malformed("not a rowcast archive")
    if len(prefix) < PREFIX.size:
        raise Malformed("truncated file")
    version = PREFIX.unpack(prefix)[1]
    if version > VERSION:
        raise Malformed(f"format version {version} needs a newer rowcast (this one reads "
                        f"1 to {VERSION})")
    if version < 1:
        raise Malformed(f"unsupported format version {version}")
    return version


class _HeaderReader:
    """Reads a format-7 header from the start of the file, keeping its CRC32 as it goes."""

    def __init__(self, f: BinaryIO, limit: int) -> None:
        """Read `f` from just after the prefix; the header must end before `limit`."""
        self._f = f
        self.pos = PREFIX.size
        self._limit = limit
        f.seek(0)
        self.crc = zlib.crc32(f.read(PREFIX.size))

    def take(self, count: int) -> bytes:
        """The next `count` bytes, refused if they run past the header's limit."""
        if count > self._limit - self.pos:
            raise Malformed("truncated file")
        data = self._f.read(count)
        if len(data) != count:
            raise Malformed("truncated file")
        self.pos += count
        self.crc = zlib.crc32(data, self.crc)
        return data

    def skip(self, count: int) -> None:
        """Pass over `count` bytes in chunks, keeping them in the CRC only."""
        if count > self._limit - self.pos:
            raise Malformed("truncated file")
        while count:
            count -= len(self.take(min(count, _CHUNK)))

    def number(self) -> int:
        """The next variable-length number."""
        data = b""
        while not data or data[-1] & 0x80:
            if len(data) == _MAX_NUMBER_BYTES:
                raise Malformed("malformed number in header")
            data += self.take(1)
        try:
            return read_number(data, 0)[0]
        except Malformed:
            raise Malformed("malformed number in header") from None


def _read_header(f: BinaryIO, size: int) -> tuple[ModelIdentity, int]:
    """Read and check a format-7 header; return the model identity and where it ends."""
    reader = _HeaderReader(f, size - TRAILER.size)
    values: dict[int, bytes] = {}
    unknown_odd: list[int] = []
    last = 0
    while tag := reader.number():
        if tag <= last:
            raise Malformed("header field tags out of order")
        last = tag
        length = reader.number()
        if tag == MODEL_SHA256_TAG and length != DIGEST_BYTES:
            raise Malformed(f"model SHA-256 field is {length} bytes")
        if tag == MODEL_NAME_TAG and length > MAX_NAME_BYTES:
            raise Malformed(f"model name field is {length} bytes")
        if tag in (MODEL_FILE_TAG, MODEL_PACKED_TAG) and not 0 < length <= MAX_MODEL_BYTES:
            raise Malformed(f"embedded model field is {length} bytes")
        if tag in (MODEL_SHA256_TAG, MODEL_NAME_TAG, MODEL_FILE_TAG, MODEL_PACKED_TAG):
            values[tag] = reader.take(length)
        else:
            reader.skip(length)
            if tag % 2:
                unknown_odd.append(tag)
    end, expected = reader.pos + _CRC.size, reader.crc
    (crc,) = _CRC.unpack(reader.take(_CRC.size))
    if crc != expected:
        raise Malformed("header CRC mismatch")
    if unknown_odd:
        raise Malformed(f"header field {unknown_odd[0]} needs a newer rowcast")
    if MODEL_SHA256_TAG not in values or MODEL_NAME_TAG not in values:
        raise Malformed("header lacks the model's name or SHA-256")
    if MODEL_FILE_TAG in values and MODEL_PACKED_TAG in values:
        raise Malformed("header holds the model both as a file and packed")
    name = _check_text(decode_utf8(values[MODEL_NAME_TAG], "model name"), "model name")
    packed = MODEL_PACKED_TAG in values
    embedded = values.get(MODEL_PACKED_TAG if packed else MODEL_FILE_TAG, b"")
    return ModelIdentity(name, values[MODEL_SHA256_TAG], embedded, packed), end


def read_trailer(f: BinaryIO, size: int, header_end: int) -> tuple[int, int, int]:
    """Read the trailer and check it against the file size; return the index's offset,
    length and CRC32."""
    if size < header_end + TRAILER.size:
        raise Malformed("truncated file")
    offset, length, crc, mark = TRAILER.unpack(read_at(f, size - TRAILER.size, TRAILER.size))
    if mark != END_MARK:
        raise Malformed("missing end mark (truncated or damaged file)")
    if offset < header_end or offset + length != size - TRAILER.size:
        raise Malformed("index location out of bounds")
    return offset, length, crc


def _file_chunks(f: BinaryIO, start: int, end: int) -> Iterator[bytes]:
    """The bytes [start, end) of the file, a chunk at a time."""
    f.seek(start)
    while start < end:
        data = f.read(min(_CHUNK, end - start))
        if not data:
            raise Malformed("truncated file")
        start += len(data)
        yield data


def _check_index_crc(f: BinaryIO, offset: int, length: int, crc: int) -> None:
    """Refuse an index whose bytes do not match the trailer's CRC32 (read in chunks)."""
    value = 0
    for data in _file_chunks(f, offset, offset + length):
        value = zlib.crc32(data, value)
    if value != crc:
        raise Malformed("index CRC mismatch")


def _index_lengths(f: BinaryIO, offset: int, length: int) -> tuple[int, int, int]:
    """The index's entry count, inflated length, and where its deflated records start;
    refuses counts and lengths that cannot be honest before anything is inflated."""
    head = read_at(f, offset, min(length, 2 * _MAX_NUMBER_BYTES))
    try:
        count, pos = read_number(head, 0)
        inflated, pos = read_number(head, pos)
    except IndexError:
        raise Malformed("truncated index") from None
    deflated = length - pos
    if inflated > MAX_INDEX_BYTES:
        raise Malformed(f"index of {inflated} bytes inflated is over {MAX_INDEX_BYTES}")
    if inflated > MAX_INFLATION * deflated:
        raise Malformed(f"{inflated} bytes of records cannot come from {deflated} deflated "
                        "bytes")
    if count > inflated // _MIN_RECORD:
        raise Malformed(f"entry count {count} cannot fit in {inflated} bytes of records")
    return count, inflated, offset + pos


def _inflate(f: BinaryIO, start: int, end: int, length: int) -> Iterator[bytes]:
    """The records inflated from the file's bytes [start, end), at most _CHUNK bytes at a
    time; refused unless they come to exactly `length` bytes and the stream ends at end."""
    inflater = zlib.decompressobj()
    produced = 0
    try:
        for data in _file_chunks(f, start, end):
            while data:
                out = inflater.decompress(data, min(_CHUNK, length - produced + 1))
                data = inflater.unconsumed_tail
                produced += len(out)
                if produced > length or inflater.unused_data:
                    raise Malformed("index does not inflate to its stated length")
                if out:
                    yield out
                elif data:
                    raise Malformed("index does not inflate")  # no progress: cannot happen
    except zlib.error:
        raise Malformed("index does not inflate") from None
    if produced != length or not inflater.eof:
        raise Malformed("index does not inflate to its stated length")


def _extensions_of(data: bytes, pos: int) -> tuple[list[tuple[int, bytes]], int]:
    """A record's extension fields (count, then tag, length, value each) at pos, and the
    position after them; IndexError when the buffer ends first."""
    count, pos = read_number(data, pos)
    if count > MAX_EXTENSIONS:
        raise Malformed(f"{count} extension fields, more than {MAX_EXTENSIONS}")
    fields = []
    last = 0
    for _ in range(count):
        tag, pos = read_number(data, pos)
        length, pos = read_number(data, pos)
        if tag <= last:
            raise Malformed("extension field tags out of order")
        if length > MAX_FIELD_BYTES:
            raise Malformed(f"extension field {tag} of {length} bytes, over {MAX_FIELD_BYTES}")
        last = tag
        end = pos + length
        if end > len(data):
            raise IndexError  # the rest of the record is in the next chunk
        fields.append((tag, data[pos:end]))
        pos = end
    return fields, pos


def _apply_extensions(fields: list[tuple[int, bytes]], entry: dict) -> None:
    """Check an entry's extension fields and put the known ones into its field dict."""
    for tag, value in fields:
        if tag == RESTORE_AS_TAG:
            restore_as = stored_path(value, "restore_as")
            if restore_as == entry["path"]:
                raise Malformed("restore_as repeats the path")
            entry["restore_as"] = restore_as
        elif tag == REASON_TAG:
            entry["reason"] = _check_text(decode_utf8(value, "reason"), "reason")
        elif tag == CARRIES_TAG:
            kinds = tuple(decode_utf8(value, "carries").split("\n"))
            if not all(_check_text(kind, "carries") for kind in kinds):
                raise Malformed("empty extras kind in carries")
            entry["carries"] = kinds
        elif tag == PARTS_TAG:
            if entry["method"] != "coded":
                raise Malformed(f"parts on a {entry['method']!r} entry")
            names = tuple(_METHOD_NAMES.get(code, "") for code in value)
            if not all(name in PART_METHODS for name in names):
                raise Malformed("unknown part method code")
            entry["parts"] = names
        elif tag % 2:
            raise Malformed(f"extension field {tag} needs a newer rowcast")


def _check_entry(entry: dict, format_code: int, pixel_limit: int) -> None:
    """Check that an entry's kind, method, format, size and lengths agree."""
    kind, method = entry["kind"], entry["method"]
    if method not in KIND_METHODS[kind]:
        raise Malformed(f"method {method!r} does not suit an entry of kind {kind!r}")
    if kind == IMAGE:
        if format_code not in _FORMATS:
            raise Malformed(f"unknown pixel format code {format_code}")
        name, planes, value_bytes = _FORMATS[format_code]
        entry["format"] = name
        check_pixels(entry["width"], entry["height"], planes, pixel_limit)
        if method == "literal":
            expected = entry["width"] * entry["height"] * planes * value_bytes
            if entry["length"] != expected:
                raise Malformed(f"literal payload is {entry['length']} bytes, expected "
                                f"{expected}")
        return
    if format_code or entry["width"] or entry["height"]:
        raise Malformed(f"a {kind} entry with a pixel format or size")
    if kind == LEFT_OUT and (entry["length"] or entry["extras_length"]):
        raise Malformed("a left-out entry with a payload or extras")
    if kind == LEFT_OUT and entry["checksum"] != _NO_CHECKSUM:
        raise Malformed("a left-out entry with a checksum")


def _records(chunks: Iterator[bytes], count: int, header_end: int, index_offset: int,
             pixel_limit: int) -> Iterator[IndexEntry]:
    """Parse and check `count` records from the inflated chunks, payloads tiling
    [header_end, index_offset) in order, and refuse clashing restored names. Written for
    speed: the fields are read inline, and a coded or PNG image without extension fields
    (the common entry) is checked without building a dict of its fields."""
    kinds, methods, formats, fast_methods = _KIND_NAMES, _METHOD_NAMES, _FORMATS, _FAST_METHODS
    image, most = KINDS[IMAGE], MAX_DIMENSION
    add_name, get_number, path_of = _Names().add, read_number, stored_path
    data, pos, position = b"", 0, header_end
    for _ in range(count):
        while True:  # parse one record, fetching the next chunk when the data ends in it
            start = pos
            try:
                n = data[pos]
                pos += 1
                if n > 127:
                    n, pos = get_number(data, pos - 1)
                    if n > MAX_PATH_BYTES:
                        raise Malformed(f"path length {n} over {MAX_PATH_BYTES}")
                raw = data[pos : pos + n]
                pos += n
                kind_code = data[pos]
                format_code = data[pos + 1]
                pos += 2
                if kind_code > 127 or format_code > 127:
                    kind_code, pos = get_number(data, pos - 2)
                    format_code, pos = get_number(data, pos)
                width = data[pos]
                pos += 1
                if width > 127:
                    width, pos = get_number(data, pos - 1)
                height = data[pos]
                pos += 1
                if height > 127:
                    height, pos = get_number(data, pos - 1)
                method_code = data[pos]
                pos += 1
                if method_code > 127:
                    method_code, pos = get_number(data, pos - 1)
                checksum = data[pos : pos + DIGEST_BYTES]
                pos += DIGEST_BYTES
                length = data[pos]
                pos += 1
                if length > 127:
                    length, pos = get_number(data, pos - 1)
                extras_length = data[pos]
                pos += 1
                if extras_length > 127:
                    extras_length, pos = get_number(data, pos - 1)
                extensions = data[pos]
                pos += 1
                if extensions:
                    fields, pos = _extensions_of(data, pos - 1)
                if pos > len(data):
                    raise IndexError
                break
            except IndexError:
                more = next(chunks, None)
                if more is None:
                    raise Malformed("truncated index") from None
                data, pos = data[start:] + more, 0
            except Malformed as problem:
                raise Malformed(f"index record after offset {position}: {problem}") from None
        try:
            path = path_of(raw)
        except Malformed as problem:
            raise Malformed(f"entry {raw.decode('utf-8', 'replace')!r}: {problem}") from None
        offset = position
        position += length + extras_length
        if (kind_code == image and not extensions and method_code in fast_methods
                and format_code in formats and 0 < width <= most and 0 < height <= most
                and width * height * formats[format_code][1] <= pixel_limit
                and position <= index_offset):
            entry = IndexEntry(path, IMAGE, formats[format_code][0], width, height,
                               fast_methods[method_code], checksum, offset, length,
                               extras_length)
        else:
            values = {"path": path, "kind": kinds.get(kind_code), "format": "",
                      "width": width, "height": height, "method": methods.get(method_code),
                      "checksum": checksum, "offset": offset, "length": length,
                      "extras_length": extras_length}
            try:
                if values["kind"] is None:
                    raise Malformed(f"unknown kind code {kind_code}")
                if values["method"] is None:
                    raise Malformed(f"unknown method code {method_code}")
                _check_entry(values, format_code, pixel_limit)
                if extensions:
                    _apply_extensions(fields, values)
                if position > index_offset:
                    raise Malformed(f"payload and extras end at {position}, past the "
                                    f"payload area ({index_offset})")
            except Malformed as problem:
                raise Malformed(f"entry {path!r}: {problem}") from None
            entry = IndexEntry(**values)
        add_name(path, entry.restore_as)
        yield entry
    if pos != len(data) or next(chunks, None) is not None:
        raise Malformed("trailing bytes in index")
    if position != index_offset:
        raise Malformed("payloads do not end where the index begins")


def _open_index(f: BinaryIO, size: int) -> tuple[ModelIdentity, int, int, int, int, int]:
    """Check a format-7 file's header, trailer, index CRC and index lengths; return the
    model, where the payload area starts and ends, the entry count, the inflated length
    and where the deflated records start."""
    model, header_end = _read_header(f, size)
    offset, length, crc = read_trailer(f, size, header_end)
    _check_index_crc(f, offset, length, crc)
    count, inflated, records = _index_lengths(f, offset, length)
    return model, header_end, offset, count, inflated, records


def _stream(src: Path, pixel_limit: int) -> Iterator[IndexEntry]:
    """The entries of a format-7 archive, read and checked in chunks from a file opened
    here (and checked again here, since it is read again)."""
    with src.open("rb") as f:
        size = os.fstat(f.fileno()).st_size
        try:
            if _read_version(f, size) != VERSION:
                raise Malformed("file changed while it was read")
            _, header_end, offset, count, inflated, start = _open_index(f, size)
            chunks = _inflate(f, start, size - TRAILER.size, inflated)
            yield from _records(chunks, count, header_end, offset, pixel_limit)
        except Malformed as problem:
            raise ArchiveError(f"{src}: {problem}") from None


def iter_index(src: Path, *, pixel_limit: int = DEFAULT_PIXEL_LIMIT
               ) -> tuple[ModelIdentity, Iterator[IndexEntry]]:
    """The model and the entries of an archive, the entries read as they are consumed
    (memory bounded by a chunk of the index and the restored names seen). The header,
    trailer and index CRC are checked now; records are checked as they come (ArchiveError).
    """
    src = Path(src)
    with src.open("rb") as f:
        size = os.fstat(f.fileno()).st_size
        try:
            version = _read_version(f, size)
            if version < VERSION:
                from rowcast import legacy  # legacy reads with this module's helpers

                model, entries = legacy.read(f, size, version, pixel_limit)
                return model, iter(entries)
            model = _open_index(f, size)[0]
        except Malformed as problem:
            raise ArchiveError(f"{src}: {problem}") from None
    return model, _stream(src, pixel_limit)


def read_index(src: Path, *, pixel_limit: int = DEFAULT_PIXEL_LIMIT,
               entry_limit: int = DEFAULT_ENTRY_LIMIT) -> tuple[ModelIdentity, list[IndexEntry]]:
    """Read and check an archive's header, trailer and index (any format version 1 to 7)
    without touching payloads. More than `entry_limit` entries are refused when the limit
    is passed, so the list never outgrows it (`iter_index` streams any number)."""
    model, entries = iter_index(src, pixel_limit=pixel_limit)
    listed = []
    for entry in entries:
        if len(listed) == entry_limit:
            raise ArchiveError(f"{src}: more than {entry_limit} entries, the limit for reading "
                               "an index whole")
        listed.append(entry)
    return model, listed


def _payload_area(f: BinaryIO, size: int) -> tuple[int, int]:
    """Where the payload area of an archive of any version starts and ends."""
    version = _read_version(f, size)
    if version < VERSION:
        from rowcast import legacy  # legacy reads with this module's helpers

        return legacy.payload_area(f, size)
    header_end = _read_header(f, size)[1]
    return header_end, read_trailer(f, size, header_end)[0]


def _read_part(src: Path, entry: IndexEntry, start: int, length: int, what: str) -> bytes:
    """Read [start, start + length) after checking that the entry's payload and extras lie
    inside the file's payload area."""
    src = Path(src)
    with src.open("rb") as f:
        size = os.fstat(f.fileno()).st_size
        try:
            first, end = _payload_area(f, size)
            if (entry.offset < first or entry.length < 0 or entry.extras_length < 0
                    or entry.offset + entry.length + entry.extras_length > end):
                raise Malformed(
                    f"entry {entry.path!r}: {what} [{start}, +{length}) outside the payload "
                    f"area [{first}, {end})")
            return read_at(f, start, length)
        except Malformed as problem:
            raise ArchiveError(f"{src}: {problem}") from None


def read_payload(src: Path, entry: IndexEntry) -> bytes:
    """Read one entry's payload by seeking to it, after checking it lies in the payload area."""
    return _read_part(src, entry, entry.offset, entry.length, "payload")


def read_extras(src: Path, entry: IndexEntry) -> bytes:
    """Read one entry's extras (stored right after its payload), checked as read_payload."""
    return _read_part(src, entry, entry.offset + entry.length, entry.extras_length, "extras")
