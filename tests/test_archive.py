"""Specification tests for archive format 7 (docs/FORMAT.md). Archives are also built here
byte by byte from FORMAT.md's tables, independently of the writer, to craft damage and
fields that the writer never writes."""

from __future__ import annotations

import hashlib
import os
import stat
import struct
import tracemalloc
import unicodedata
import zlib
from collections.abc import Iterator
from pathlib import Path

import pytest
from conftest import assert_flips_refused

from rowcast import archive
from rowcast.archive import (
    DEFAULT_PIXEL_LIMIT,
    KINDS,
    METHODS,
    ArchiveError,
    Entry,
    IndexEntry,
    ModelIdentity,
    iter_index,
    normalise_path,
    read_extras,
    read_index,
    read_payload,
    write_archive,
)

MODEL = ModelIdentity("tiny-v1", hashlib.sha256(b"model bytes").digest())
TRAILER = struct.Struct("<QQI4s")
CODED, LITERAL, PNG, BYTES, NONE = 2, 1, 3, 4, 5  # FORMAT.md's method codes
RGB, L16, ONE_BIT = 2, 7, 6  # pixel format codes (rowcast.pixelformats)


def digest(text: str) -> bytes:
    """A stand-in checksum."""
    return hashlib.sha256(text.encode()).digest()


def image(path: str, payload: bytes = b"\x01\x02", **fields) -> Entry:
    """A coded 2 x 1 RGB image entry; keyword fields override."""
    values = dict(path=path, kind="image", format="RGB", width=2, height=1, method="coded",
                  checksum=digest(path), payload=payload)
    values.update(fields)
    return Entry(**values)


SAMPLE = [
    image("cats/tabby.png", b"\x09" * 7, extras=b"\x01\x03abc", carries=("icc",),
          parts=("adaptive",)),
    Entry("gray/ночь.png", "image", "L16", 3, 2, "literal", digest("n"), bytes(12)),
    Entry("bits/mask.png", "image", "1", 5, 3, "literal", digest("m"), bytes(15)),
    image("日本/写真.png", b"\x89PNG", method="png", restore_as="日本/写真 (1).png"),
    Entry("notes/readme.txt", "file", "", 0, 0, "bytes", digest("r"), b"hello",
          reason="not an image"),
    Entry("big/huge.tif", "left out", "", 0, 0, "none", bytes(32), b"",
          reason="over the size limit"),
    image("empty/nothing.png", b""),
]


def listed(entries: list[Entry], start: int) -> list[IndexEntry]:
    """The index entries a reader must list for `entries` written from offset `start`."""
    out = []
    for e in entries:
        out.append(IndexEntry(normalise_path(e.path), e.kind, e.format, e.width, e.height,
                              e.method, e.checksum, start, len(e.payload), len(e.extras),
                              e.restore_as, e.reason, e.carries, e.parts))
        start += len(e.payload) + len(e.extras)
    return out


# ---- FORMAT.md, byte by byte ------------------------------------------------------------


def num(value: int) -> bytes:
    """FORMAT.md's variable-length number: 7 bits a byte, low first, high bit = more."""
    out = b""
    while value > 0x7F:
        out += bytes([value & 0x7F | 0x80])
        value >>= 7
    return out + bytes([value])


def tagged(tag: int, value: bytes) -> bytes:
    """A tagged field: tag, length, value."""
    return num(tag) + num(len(value)) + value


def header(fields: bytes | None = None, version: int = 7) -> bytes:
    """Magic, version, the fields (by default the model's SHA-256 and name), tag 0, CRC32."""
    if fields is None:
        fields = tagged(1, MODEL.sha256) + tagged(2, MODEL.name.encode())
    head = b"ROWCAST\xe5" + struct.pack("<H", version) + fields + b"\0"
    return head + struct.pack("<I", zlib.crc32(head))


def record(path: bytes, kind: int = 1, fmt: int = RGB, width: int = 2, height: int = 1,
           method: int = CODED, checksum: bytes = bytes(32), length: int = 0,
           extras: int = 0, extensions: tuple[tuple[int, bytes], ...] = ()) -> bytes:
    """One index record, inflated."""
    return (num(len(path)) + path + num(kind) + num(fmt) + num(width) + num(height)
            + num(method) + checksum + num(length) + num(extras) + num(len(extensions))
            + b"".join(tagged(t, v) for t, v in extensions))


def index(records: list[bytes], count: int | None = None, inflated: int | None = None,
          deflated: bytes | None = None) -> bytes:
    """Entry count, inflated length, the records deflated."""
    raw = b"".join(records)
    return (num(len(records) if count is None else count)
            + num(len(raw) if inflated is None else inflated)
            + (zlib.compress(raw, 9) if deflated is None else deflated))


def build(records: list[bytes], area: bytes = b"", head: bytes | None = None,
          the_index: bytes | None = None) -> bytes:
    """A whole archive: header, payload area, index, trailer."""
    head = header() if head is None else head
    the_index = index(records) if the_index is None else the_index
    return (head + area + the_index
            + TRAILER.pack(len(head) + len(area), len(the_index), zlib.crc32(the_index),
                           b"RCIX"))


def refused(tmp_path: Path, data: bytes, reason: str, **options) -> None:
    """Write data to a file and check that reading its index is refused for `reason`."""
    src = tmp_path / "crafted.rowcast"
    src.write_bytes(data)
    with pytest.raises(ArchiveError, match=reason) as caught:
        read_index(src, **options)
    assert caught.value.args[0].startswith(f"{src}: ")
    assert "\n" not in caught.value.args[0]


def written(tmp_path: Path, entries: list[Entry] = SAMPLE) -> Path:
    """Write entries to a fresh archive and return its path."""
    dest = tmp_path / "sample.rowcast"
    write_archive(dest, MODEL, entries)
    return dest


# ---- codes and layout -------------------------------------------------------------------


def test_kind_and_method_codes_are_the_agreed_ones() -> None:
    """Codes are part of the format (FORMAT.md's tables) and never change or get reused."""
    assert KINDS == {"image": 1, "file": 2, "left out": 3}
    assert METHODS == {"literal": 1, "coded": 2, "png": 3, "bytes": 4, "none": 5,
                       "model": 6, "tuned": 7, "adaptive": 8, "zlib": 9, "difference": 10}
    assert archive.VERSION == 7 and DEFAULT_PIXEL_LIMIT == 2**28


def test_the_writer_lays_out_bytes_as_format_md_says(tmp_path: Path) -> None:
    """Header, payloads then extras, the deflated records and the trailer are the bytes
    built here from FORMAT.md's tables."""
    dest = written(tmp_path, SAMPLE[:1] + SAMPLE[3:6])
    cats, photo, notes = SAMPLE[0], SAMPLE[3], SAMPLE[4]
    records = [
        record(b"cats/tabby.png", checksum=cats.checksum, length=7, extras=5,
               extensions=((4, b"icc"), (6, bytes([8])))),
        record("日本/写真.png".encode(), method=PNG, checksum=photo.checksum, length=4,
               extensions=((1, "日本/写真 (1).png".encode()),)),
        record(b"notes/readme.txt", kind=2, fmt=0, width=0, height=0, method=BYTES,
               checksum=notes.checksum, length=5, extensions=((2, b"not an image"),)),
        record(b"big/huge.tif", kind=3, fmt=0, width=0, height=0, method=NONE,
               extensions=((2, b"over the size limit"),)),
    ]
    area = cats.payload + cats.extras + photo.payload + notes.payload
    expected = build(records, area)
    assert dest.read_bytes() == expected


def test_every_kind_round_trips(tmp_path: Path) -> None:
    """Images (coded, PNG, literal 16-bit and 1-bit), a file kept as bytes and a file left
    out come back with every field, their payloads and their extras."""
    dest = tmp_path / "a.rowcast"
    size = write_archive(dest, MODEL, iter(SAMPLE))
    assert size == dest.stat().st_size
    model, entries = read_index(dest)
    assert model == MODEL
    assert entries == listed(SAMPLE, len(header()))
    for written_entry, entry in zip(SAMPLE, entries, strict=True):
        assert read_payload(dest, entry) == written_entry.payload
        assert read_extras(dest, entry) == written_entry.extras
        assert (entry.version, entry.layout) == (7, "streamed")
    assert entries[3].restored_path == "日本/写真 (1).png"
    assert entries[0].restored_path == "cats/tabby.png"


def test_iter_index_lists_what_read_index_lists_as_it_goes(tmp_path: Path) -> None:
    """Entries stream one at a time, even when a record is split across many chunks of
    the inflated index (here 7 bytes each)."""
    dest = written(tmp_path)
    model, entries = iter_index(dest)
    assert model == MODEL
    assert next(entries) == read_index(dest)[1][0]
    archive_chunk = archive._CHUNK
    try:
        archive._CHUNK = 7
        assert list(iter_index(dest)[1]) == read_index(dest)[1]
    finally:
        archive._CHUNK = archive_chunk


def test_an_empty_archive_round_trips(tmp_path: Path) -> None:
    """An archive with no entries is valid and lists nothing."""
    assert read_index(written(tmp_path, [])) == (MODEL, [])


def test_paths_are_stored_normalised_and_restore_as_only_when_it_differs(
        tmp_path: Path) -> None:
    """The writer stores canonical paths (NFC, POSIX); a restore_as equal to the path is
    not stored."""
    decomposed = unicodedata.normalize("NFD", "café/./b.png")
    dest = written(tmp_path, [image(decomposed, restore_as="café/b.png")])
    (entry,) = read_index(dest)[1]
    assert entry.path == unicodedata.normalize("NFC", "café/b.png")
    assert entry.restore_as is None


# ---- header fields ----------------------------------------------------------------------


def test_an_unknown_even_header_field_is_ignored(tmp_path: Path) -> None:
    """A field a reader may ignore (even tag) is skipped, however long."""
    fields = tagged(1, MODEL.sha256) + tagged(2, MODEL.name.encode()) + tagged(4, bytes(3000))
    src = tmp_path / "later.rowcast"
    src.write_bytes(build([record(b"a.png")], head=header(fields)))
    model, (entry,) = read_index(src)
    assert model == MODEL and entry.path == "a.png"


@pytest.mark.parametrize(("fields", "reason"), [
    (tagged(1, MODEL.sha256) + tagged(2, b"m") + tagged(7, b"model"),
     "header field 7 needs a newer rowcast"),
    (tagged(2, b"m") + tagged(1, MODEL.sha256), "out of order"),
    (tagged(1, MODEL.sha256), "lacks the model's name or SHA-256"),
    (tagged(2, b"m"), "lacks the model's name or SHA-256"),
    (tagged(1, bytes(31)) + tagged(2, b"m"), "SHA-256 field is 31 bytes"),
    (tagged(1, MODEL.sha256) + tagged(2, b"\xff"), "model name is not valid UTF-8"),
    (tagged(1, MODEL.sha256) + tagged(2, b"m\x1b[2J"), "control character in model name"),
])
def test_header_fields_are_checked(tmp_path: Path, fields: bytes, reason: str) -> None:
    """A field a reader must understand (odd tag) and does not is refused by its tag; known
    fields must be there, once, in tag order, with their sizes."""
    refused(tmp_path, build([], head=header(fields)), reason)


@pytest.mark.parametrize(("version", "reason"), [
    (8, "format version 8 needs a newer rowcast"), (0, "unsupported format version 0")])
def test_unknown_versions_are_refused_by_number(tmp_path: Path, version: int,
                                                reason: str) -> None:
    """Readers never guess: a later version asks for a newer rowcast, also when a payload
    alone is read."""
    data = build([], head=header(version=version))
    refused(tmp_path, data, reason)
    with pytest.raises(ArchiveError, match=reason):
        read_payload(tmp_path / "crafted.rowcast",
                     IndexEntry("x", "image", "L", 1, 1, "coded", bytes(32), 30, 1))


def test_wrong_magic_is_not_an_archive(tmp_path: Path) -> None:
    """A file without our magic bytes is refused as not an archive."""
    refused(tmp_path, b"NOTOURS!" + build([])[8:], "not a rowcast archive$")


# ---- index records ----------------------------------------------------------------------


def test_an_unknown_even_extension_field_is_ignored(tmp_path: Path) -> None:
    """A record field a reader may ignore (even tag) is skipped; known ones still apply."""
    src = tmp_path / "later.rowcast"
    src.write_bytes(build([record(b"a.png", extensions=((2, b"why"), (8, b"later")))]))
    (entry,) = read_index(src)[1]
    assert entry.reason == "why"


@pytest.mark.parametrize(("extensions", "reason"), [
    (((9, b"must"),), "extension field 9 needs a newer rowcast"),
    (((4, b"a"), (2, b"b")), "out of order"),
    (((2, b"x"), (2, b"y")), "out of order"),
    (((1, b"a.png"),), "restore_as repeats the path"),
    (((1, b"../x.png"),), r"'\.\.' component"),
    (((2, b"\xc3"),), "reason is not valid UTF-8"),
    (((2, b"bad\x07"),), "control character in reason"),
    (((4, b"icc\n"),), "empty extras kind"),
    (((6, bytes([2])),), "unknown part method"),
])
def test_extension_fields_are_checked(tmp_path: Path, extensions: tuple, reason: str) -> None:
    """A record field a reader must understand (odd tag) and does not is refused by its tag;
    known fields must hold what FORMAT.md says."""
    refused(tmp_path, build([record(b"a.png", extensions=extensions)]), reason)


def test_extension_fields_are_bounded_in_number_and_size(tmp_path: Path) -> None:
    """At most 255 extension fields a record, each of at most 65535 bytes (so a record
    fits in a few MB), by the reader and the writer."""
    extensions = tuple((2 * i + 2, b"") for i in range(256))
    refused(tmp_path, build([record(b"a.png", extensions=extensions)]), "more than 255")
    refused(tmp_path, build([record(b"a.png", extensions=((8, bytes(2**16)),))]),
            "extension field 8 of 65536 bytes, over 65535")
    with pytest.raises(ArchiveError, match="extension field 2 of 65536 bytes"):
        written(tmp_path, [image("a.png", reason="x" * 2**16)])


@pytest.mark.parametrize(("fields", "reason"), [
    ({"kind": 4}, "unknown kind code 4"),
    ({"method": 11}, "unknown method code 11"),
    ({"method": BYTES}, "method 'bytes' does not suit an entry of kind 'image'"),
    ({"kind": 2, "fmt": 0, "width": 0, "height": 0},
     "method 'coded' does not suit an entry of kind 'file'"),
    ({"kind": 2, "method": BYTES}, "file entry with a pixel format or size"),
    ({"kind": 3, "fmt": 0, "width": 0, "height": 0, "method": NONE, "length": 1},
     "left-out entry with a payload"),
    ({"kind": 3, "fmt": 0, "width": 0, "height": 0, "method": NONE, "checksum": b"\1" * 32},
     "left-out entry with a checksum"),
    ({"fmt": 11}, "unknown pixel format code 11"),
    ({"width": 0}, "width 0"),
    ({"height": 2**32}, "height 4294967296"),
    ({"method": LITERAL, "length": 5}, "literal payload is 5 bytes, expected 6"),
    ({"fmt": L16, "method": LITERAL, "length": 2}, "expected 4"),
    ({"method": PNG, "extensions": ((6, bytes([7])),)}, "parts on a 'png' entry"),
    ({"length": 10**6}, "past the payload area"),
])
def test_records_are_checked(tmp_path: Path, fields: dict, reason: str) -> None:
    """Kinds, methods, formats, sizes and lengths must agree (FORMAT.md's record rules)."""
    length = fields.get("length", 0)
    refused(tmp_path, build([record(b"a.png", **fields)], bytes(length if length < 99 else 0)),
            reason)


def test_literal_payloads_hold_two_bytes_a_16_bit_value_and_a_byte_a_1_bit_one(
        tmp_path: Path) -> None:
    """The raw size of a literal payload: width x height x planes x (2 for 16-bit, else
    1), 1-bit values one a byte."""
    good = [record(b"a", fmt=L16, width=3, height=2, method=LITERAL, length=12),
            record(b"b", fmt=ONE_BIT, width=5, height=3, method=LITERAL, length=15)]
    src = tmp_path / "lit.rowcast"
    src.write_bytes(build(good, bytes(27)))
    assert [e.length for e in read_index(src)[1]] == [12, 15]
    with pytest.raises(ArchiveError, match="literal payload is 13 bytes, expected 12"):
        written(tmp_path, [Entry("a", "image", "L16", 3, 2, "literal", digest("a"),
                                 bytes(13))])


@pytest.mark.parametrize(("path", "reason"), [
    (b"../x.png", r"'\.\.' component"), (b"/a/x.png", "absolute path"),
    (b"a//x.png", "not in canonical form"), (b"a/./x.png", "not in canonical form"),
    (b"a/x.png/", "not in canonical form"), (b"C:x.png", "drive-letter"),
    (b"a\\x.png", "backslash"), (b"a\x1b.png", "forbidden character U\\+001B"),
    (b"", "empty path"), (b"\xff.png", "not valid UTF-8"),
    (unicodedata.normalize("NFD", "é.png").encode(), "not in canonical form"),
])
def test_unsafe_or_non_canonical_stored_paths_are_refused(tmp_path: Path, path: bytes,
                                                          reason: str) -> None:
    """Stored paths must already be canonical and safe."""
    refused(tmp_path, build([record(path, extensions=((2, b"why"),))]), reason)


@pytest.mark.parametrize(("the_index", "reason"), [
    (index([record(b"a.png")], count=2), "cannot fit"),
    (index([record(b"a.png")], count=0), "trailing bytes in index"),
    (index([record(b"a.png") + b"\0"]), "trailing bytes in index"),
    (index([], count=1, inflated=42, deflated=zlib.compress(bytes(42))), "empty path"),
    (index([record(b"a.png")], inflated=50), "stated length"),
    (index([record(b"a.png")], inflated=200), "stated length"),
    (index([record(b"a.png")], deflated=b"not zlib at all"), "does not inflate"),
    (index([record(b"a.png")])[:-3], "does not inflate to its stated length"),
    (index([record(b"a.png")]) + b"\0", "does not inflate to its stated length"),
    (b"\x81\x00" + index([])[1:], "malformed number"),
    (b"\x01", "truncated index"),
    (num(0) + num(2**32 + 1) + zlib.compress(b""), "over 4294967296"),
])
def test_crafted_indexes_are_refused(tmp_path: Path, the_index: bytes, reason: str) -> None:
    """Counts and lengths that do not add up, or records that break a rule, are refused."""
    refused(tmp_path, build([], the_index=the_index), reason)


def test_a_record_with_a_padded_number_is_refused(tmp_path: Path) -> None:
    """A number never ends in a zero byte unless it is the single byte 00."""
    padded = record(b"a.png").replace(b"a.png\x01\x02\x02", b"a.png\x01\x02\x82\x00")
    refused(tmp_path, build([padded]), "malformed number")


# ---- hardening --------------------------------------------------------------------------


CLASHES = [
    (["A.png", "a.png"], "'A.png' and 'a.png' restore to the same name"),
    (["Straße.png", "STRASSE.png"], "restore to the same name"),
    (["x/É.png", unicodedata.normalize("NFD", "x/é.png")], "restore to the same name"),
    (["d.png", "d.png/e.png"], "'d.png/e.png' needs as a directory the name that entry "
                               "'d.png' restores to"),
    (["D.png/e.png", "d.png"], "'d.png' restores to a name that entry 'D.png/e.png' needs"),
    (["a/b/c.png", "a/B"], "'a/B' restores to a name that entry 'a/b/c.png' needs"),
]


@pytest.mark.parametrize(("paths", "reason"), CLASHES)
def test_the_writer_refuses_clashing_restored_names(tmp_path: Path, paths: list[str],
                                                    reason: str) -> None:
    """Names that would overwrite each other on a case-insensitive file system, or a file
    where another entry needs a directory, are refused naming both; nothing is left."""
    with pytest.raises(ArchiveError, match=reason):
        written(tmp_path, [image(p) for p in paths])
    assert list(tmp_path.iterdir()) == []


@pytest.mark.parametrize(("paths", "reason"), CLASHES)
def test_the_reader_refuses_clashing_restored_names(tmp_path: Path, paths: list[str],
                                                    reason: str) -> None:
    """The same rule holds for archives not written by rowcast."""
    records = [record(unicodedata.normalize("NFC", p).encode()) for p in paths]
    refused(tmp_path, build(records), reason)


def test_restore_as_takes_part_in_the_clash_rules(tmp_path: Path) -> None:
    """It is the restored name that must be unique: a restore_as may free a path (two
    entries named alike, one restored elsewhere) or make a clash."""
    dest = written(tmp_path, [image("a.png"), image("A.png", restore_as="a (1).png")])
    assert [e.restored_path for e in read_index(dest)[1]] == ["a.png", "a (1).png"]
    with pytest.raises(ArchiveError, match="'a.png' and 'b.png' restore to the same name"):
        write_archive(tmp_path / "no.rowcast", MODEL,
                      [image("a.png"), image("b.png", restore_as="A.png")])
    refused(tmp_path, build([record(b"a.png"), record(b"b.png", extensions=((1, b"A.png"),))]),
            "restore to the same name")


def test_path_components_over_255_bytes_are_refused(tmp_path: Path) -> None:
    """No file system keeps a name of more than 255 bytes: writer and reader refuse it, in
    the path or in restore_as; 255 bytes are fine."""
    fine, long = "é" * 127 + "x", "é" * 128
    written(tmp_path, [image(f"d/{fine}"), image("b.png", restore_as=f"{fine}/{fine}")])
    for entry in (image(f"d/{long}/x.png"), image("a.png", restore_as=long)):
        with pytest.raises(ArchiveError, match="component is over 255 UTF-8 bytes"):
            write_archive(tmp_path / "no.rowcast", MODEL, [entry])
    refused(tmp_path, build([record(f"d/{long}".encode())]), "over 255")


def test_declared_sizes_above_the_pixel_limit_are_refused(tmp_path: Path) -> None:
    """width x height x planes above the limit (2**28 subpixels unless given) is refused
    before anything is allocated, by the writer and the reader; a reader given a higher
    limit lists it."""
    huge = record(b"a.png", width=2**16, height=2**12 + 1)  # x 3 planes > 2**28
    refused(tmp_path, build([huge]), "65536 x 4097 x 3 subpixels exceed the limit of "
                                     "268435456")
    refused(tmp_path, build([record(b"a.png", width=2**32 - 1, height=2**32 - 1)]),
            "exceed the limit")
    refused(tmp_path, build([record(b"a.png", width=10, height=10)]), "exceed the limit of 299",
            pixel_limit=299)
    assert len(read_index(tmp_path / "crafted.rowcast", pixel_limit=300)[1]) == 1
    src = tmp_path / "big.rowcast"
    src.write_bytes(build([huge]))
    assert read_index(src, pixel_limit=2**30)[1][0].width == 2**16
    with pytest.raises(ArchiveError, match="exceed the limit"):
        written(tmp_path, [image("a.png", width=2**16, height=2**12 + 1)])


def test_a_lying_inflated_length_cannot_make_the_reader_allocate(tmp_path: Path) -> None:
    """An index that inflates to far more than it states is refused after at most the
    stated length (plus a byte) of records, inflated in chunks: reading 20 MB of zeros
    that claim to be 4 MB stays within a few MB."""
    bomb = zlib.compress(bytes(20 * 2**20), 9)
    src = tmp_path / "bomb.rowcast"
    src.write_bytes(build([], the_index=num(1) + num(4 * 2**20) + bomb))
    tracemalloc.start()
    try:
        with pytest.raises(ArchiveError, match="stated length|empty path"):
            read_index(src)
        peak = tracemalloc.get_traced_memory()[1]
    finally:
        tracemalloc.stop()
    assert peak < 8 * 2**20
    with src.open("rb") as f:  # the inflater alone: never a byte more than stated + 1
        start = len(header()) + len(num(1) + num(4 * 2**20))
        chunks = archive._inflate(f, start, src.stat().st_size - TRAILER.size, 4 * 2**20)
        produced = []
        with pytest.raises(archive.Malformed, match="does not inflate to its stated length"):
            for chunk in chunks:
                produced.append(len(chunk))
        assert sum(produced) == 4 * 2**20 and max(produced) <= 2**20
    refused(tmp_path, build([], the_index=num(1) + num(1033 * 40) + bytes(40)),
            "cannot come from 40 deflated bytes")


# ---- damage -----------------------------------------------------------------------------


def test_single_byte_flips_in_header_index_and_trailer_are_refused(tmp_path: Path) -> None:
    """Every byte of the header and trailer and a sample of the index, flipped, gives
    ArchiveError naming the file on one line (their CRCs and checks); flips in payloads
    and extras read cleanly: the container never looks inside them (the pixel checksum
    guards them)."""
    original = written(tmp_path, SAMPLE[:5]).read_bytes()
    head = len(header())
    offset = TRAILER.unpack(original[-TRAILER.size :])[0]
    positions = [*range(head), *range(offset, len(original), 3),
                 *range(len(original) - TRAILER.size, len(original))]
    damaged = tmp_path / "damaged.rowcast"
    assert_flips_refused(original, positions, (0x01, 0x80), damaged, read_index)
    for position in range(head, offset, 5):
        data = bytearray(original)
        data[position] ^= 0xFF
        damaged.write_bytes(bytes(data))
        entries = read_index(damaged)[1]
        assert sum(len(read_payload(damaged, e)) + len(read_extras(damaged, e))
                   for e in entries) == offset - head


def test_every_truncation_is_refused(tmp_path: Path) -> None:
    """Cutting the file at any length gives ArchiveError naming the file."""
    data = written(tmp_path, SAMPLE[:3]).read_bytes()
    cut = tmp_path / "cut.rowcast"
    for length in range(len(data)):
        cut.write_bytes(data[:length])
        with pytest.raises(ArchiveError) as caught:
            read_index(cut)
        assert caught.value.args[0].startswith(f"{cut}: ")


def test_payloads_outside_the_payload_area_are_not_read(tmp_path: Path) -> None:
    """read_payload and read_extras refuse entries reaching outside the payload area, and
    a truncated file."""
    dest = written(tmp_path)
    entries = read_index(dest)[1]
    size = dest.stat().st_size
    for offset, length, extras in [(size - 4, 8, 0), (0, 4, 0), (entries[0].offset, -1, 0),
                                   (size, 0, 0), (entries[-1].offset, 0, 10**6)]:
        forged = IndexEntry("x", "image", "RGB", 1, 1, "coded", bytes(32), offset, length,
                            extras)
        for read in (read_payload, read_extras):
            with pytest.raises(ArchiveError, match="outside the payload area"):
                read(dest, forged)
    dest.write_bytes(dest.read_bytes()[:-1])
    with pytest.raises(ArchiveError, match="end mark"):
        read_payload(dest, entries[0])


# ---- the writer -------------------------------------------------------------------------


@pytest.mark.parametrize(("entry", "reason"), [
    (image("../x.png"), r"'\.\.' component"),
    (image("x", kind="folder"), "unknown kind 'folder'"),
    (image("x", method="zip"), "unknown method 'zip'"),
    (image("x", method="bytes"), "method 'bytes' does not suit an entry of kind 'image'"),
    (image("x", method="model"), "method 'model' does not suit an entry of kind 'image'"),
    (image("x", format="CMYK"), "unknown pixel format 'CMYK'"),
    (image("x", width=0), "width 0"),
    (image("x", height=-1), "height -1"),
    (image("x", checksum=bytes(31)), "checksum is 31 bytes"),
    (image("x", method="literal", payload=bytes(5)), "expected 6"),
    (image("x", method="png", parts=("model",)), "parts given for method 'png'"),
    (image("x", parts=("coded",)), "unknown part method 'coded'"),
    (image("x", carries=("a\nb",)), "line break"),
    (image("x", reason="two\nlines"), "control character in reason"),
    (image("x", restore_as="/etc/passwd"), "absolute path"),
    (Entry("x", "file", "", 0, 0, "coded", bytes(32), b""),
     "does not suit an entry of kind 'file'"),
    (Entry("x", "file", "RGB", 1, 1, "bytes", bytes(32), b""), "no pixel format or size"),
    (Entry("x", "left out", "", 0, 0, "none", bytes(32), b"x"), "no payload or extras"),
    (Entry("x", "left out", "", 0, 0, "none", digest("x"), b""), "checksum is all zeros"),
])
def test_the_writer_refuses_invalid_entries(tmp_path: Path, entry: Entry, reason: str) -> None:
    """Each invalid field is refused with its reason, naming the entry; no file is left."""
    with pytest.raises(ArchiveError, match=reason) as caught:
        written(tmp_path, [entry])
    assert f"entry {entry.path!r}" in caught.value.args[0]
    assert list(tmp_path.iterdir()) == []


@pytest.mark.parametrize(("model", "reason"), [
    (ModelIdentity("m" * 256, bytes(32)), "longer than 255"),
    (ModelIdentity("m", bytes(31)), "SHA-256 is 31 bytes"),
])
def test_the_writer_refuses_an_invalid_model_identity(tmp_path: Path, model: ModelIdentity,
                                                      reason: str) -> None:
    """A model name over 255 bytes or a digest of the wrong size is refused."""
    with pytest.raises(ArchiveError, match=reason):
        write_archive(tmp_path / "m.rowcast", model, SAMPLE)
    assert list(tmp_path.iterdir()) == []


def test_a_failure_mid_iteration_leaves_no_file_behind(tmp_path: Path) -> None:
    """An exception from the entry source leaves neither dest nor a temporary file."""

    def entries() -> Iterator[Entry]:
        yield SAMPLE[0]
        raise RuntimeError("source image vanished")

    with pytest.raises(RuntimeError, match="vanished"):
        write_archive(tmp_path / "out.rowcast", MODEL, entries())
    assert list(tmp_path.iterdir()) == []


def test_a_failed_overwrite_keeps_the_old_archive(tmp_path: Path) -> None:
    """A failed forced write leaves the existing archive untouched."""
    dest = written(tmp_path)
    before = dest.read_bytes()
    with pytest.raises(ArchiveError):
        write_archive(dest, MODEL, [SAMPLE[0], SAMPLE[0]], force=True)
    assert dest.read_bytes() == before
    assert list(tmp_path.iterdir()) == [dest]


def test_an_existing_destination_needs_force(tmp_path: Path) -> None:
    """An existing destination is never overwritten without force, and is with it."""
    dest = tmp_path / "keep.rowcast"
    dest.write_bytes(b"precious")
    with pytest.raises(ArchiveError, match=r"keep\.rowcast: already exists"):
        write_archive(dest, MODEL, SAMPLE)
    assert dest.read_bytes() == b"precious"
    write_archive(dest, MODEL, SAMPLE, force=True)
    assert len(read_index(dest)[1]) == len(SAMPLE)


@pytest.mark.skipif(os.name != "posix", reason="symbolic links")
@pytest.mark.parametrize("force", [False, True])
def test_the_writer_never_writes_through_a_symbolic_link(tmp_path: Path, force: bool) -> None:
    """A symbolic link at dest is refused, with or without force; its target and the link
    stay as they were."""
    target = tmp_path / "target"
    target.write_bytes(b"elsewhere")
    link = tmp_path / "link.rowcast"
    link.symlink_to(target)
    with pytest.raises(ArchiveError, match="symbolic link"):
        write_archive(link, MODEL, SAMPLE, force=force)
    assert link.is_symlink() and target.read_bytes() == b"elsewhere"
    assert sorted(p.name for p in tmp_path.iterdir()) == ["link.rowcast", "target"]


@pytest.mark.skipif(os.name != "posix", reason="POSIX file modes")
@pytest.mark.parametrize("umask", [0o022, 0o077])
def test_an_archive_gets_the_mode_of_any_new_file(tmp_path: Path, umask: int) -> None:
    """Like a file that open() creates (0o666 less the umask, POSIX), not the private
    0o600 of the temporary file it was written through; the umask is left as it was."""
    before = os.umask(umask)
    try:
        dest = written(tmp_path)
        assert os.umask(umask) == umask
    finally:
        os.umask(before)
    assert stat.S_IMODE(dest.stat().st_mode) == 0o666 & ~umask


# ---- paths ------------------------------------------------------------------------------


@pytest.mark.parametrize(("given", "expected"), [
    ("a/b.png", "a/b.png"), ("./a//b.png", "a/b.png"), ("a/./b/", "a/b"),
    (unicodedata.normalize("NFD", "é.png"), "\u00e9.png"), (".hidden/x", ".hidden/x"),
    ("a/.b", "a/.b"), ("ab:c", "ab:c"),
])
def test_normalise_path_accepts_relative_paths(tmp_path: Path, given: str,
                                               expected: str) -> None:
    """Relative paths are reduced to their canonical form, which the reader accepts."""
    assert normalise_path(given) == expected
    assert read_index(written(tmp_path, [image(given)]))[1][0].path == expected


@pytest.mark.parametrize(
    "bad", ["/abs.png", "../x.png", "a/../../x", "a/../b", "", ".", "a\\b", "a\x00b", "a\nb",
            "C:/x", "c:x"])
def test_normalise_path_refuses_unsafe_paths(bad: str) -> None:
    """Unsafe or empty paths are refused with a one-line message naming them."""
    with pytest.raises(ArchiveError) as caught:
        normalise_path(bad)
    assert caught.value.args[0].startswith(repr(bad))
    assert "\n" not in caught.value.args[0]


def test_an_embedded_model_is_header_field_3_and_read_back_whole(tmp_path: Path) -> None:
    """FORMAT.md: tag 3 holds the model file's bytes after the name; the reader returns
    them with the identity, and the container never looks inside them."""
    model_file = bytes(range(256)) * 40
    dest = tmp_path / "embedded.rowcast"
    write_archive(dest, ModelIdentity(MODEL.name, MODEL.sha256, model_file), [image("a")])
    expected = header(tagged(1, MODEL.sha256) + tagged(2, MODEL.name.encode())
                      + tagged(3, model_file))

    assert dest.read_bytes().startswith(expected)
    ident, (entry,) = read_index(dest)
    assert ident == ModelIdentity(MODEL.name, MODEL.sha256, model_file)
    assert ident.embedded == model_file and entry.path == "a"


def test_a_packed_model_is_header_field_5_and_never_beside_a_model_file(tmp_path: Path) -> None:
    """FORMAT.md: tag 5 (odd: a reader that does not know it refuses the archive) holds the
    packed model, opaque to the container; a header with both forms is refused."""
    packed = b"packed model bytes"
    dest = tmp_path / "packed.rowcast"
    write_archive(dest, ModelIdentity(MODEL.name, MODEL.sha256, packed, packed=True),
                  [image("a")])
    fields = tagged(1, MODEL.sha256) + tagged(2, MODEL.name.encode())
    assert dest.read_bytes().startswith(header(fields + tagged(5, packed)))
    ident, _ = read_index(dest)
    assert ident == ModelIdentity(MODEL.name, MODEL.sha256, packed, packed=True)
    refused(tmp_path, build([], head=header(fields + tagged(3, b"file") + tagged(5, b"pack"))),
            "both as a file and packed")


@pytest.mark.parametrize(("length", "reason"), [
    (0, "embedded model field is 0 bytes"),
    (2**24 + 1, "embedded model field is 16777217 bytes"),
    (5000, "truncated file"),  # declared longer than the file: refused before reading
])
def test_an_embedded_model_field_of_a_wrong_length_is_refused(tmp_path: Path, length: int,
                                                                reason: str) -> None:
    fields = (tagged(1, MODEL.sha256) + tagged(2, MODEL.name.encode()) + num(3) + num(length)
              + b"\x00" * min(length, 10))
    refused(tmp_path, build([], head=header(fields)), reason)
