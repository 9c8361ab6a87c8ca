"""Specification tests for the archive format, versions 1 to 3 (docs/FORMAT.md)."""

from __future__ import annotations

import hashlib
import os
import stat
import struct
import unicodedata
import zlib
from collections.abc import Iterator
from pathlib import Path

import pytest

from rowcast.archive import (
    METHODS,
    MODES,
    ArchiveError,
    Entry,
    IndexEntry,
    ModelIdentity,
    normalise_path,
    payload_layout,
    read_index,
    read_payload,
    write_archive,
)

MODEL = ModelIdentity("tiny-v1", hashlib.sha256(b"model bytes").digest())
TRAILER = struct.Struct("<QQI4s")
RECORD_FIELDS = struct.Struct("<BBII32sQQ")


def stored(path: str, mode: str, width: int, height: int, fill: int) -> Entry:
    """Build a stored entry whose raw planes are `fill` repeated."""
    planes = {"L": 1, "RGB": 3}[mode]
    payload = bytes([fill % 256]) * (width * height * planes)
    return Entry(path, mode, width, height, "stored", hashlib.sha256(payload).digest(), payload)


def coded(path: str, payload: bytes) -> Entry:
    """Build a model-coded entry with an arbitrary payload of whole 32-bit words."""
    return Entry(path, "RGB", 5, 4, "model", hashlib.sha256(path.encode()).digest(), payload)


SAMPLE = [
    stored("cats/tabby.png", "RGB", 3, 2, 7),
    stored("gray/ночь.png", "L", 4, 5, 200),
    coded("empty/nothing.png", b""),
    coded("日本/写真.png", bytes(range(16))),
]


def write_sample(tmp_path: Path, entries: list[Entry] = SAMPLE, version: int = 3) -> Path:
    """Write `entries` to a fresh archive in tmp_path and return its path."""
    dest = tmp_path / "sample.rca"
    write_archive(dest, MODEL, entries, version=version)
    return dest


def read_everything(src: Path) -> None:
    """Read the index and every payload, as a reader extracting all entries would."""
    _, entries = read_index(src)
    for entry in entries:
        read_payload(src, entry)


def locate_index(data: bytes) -> tuple[int, int]:
    """Return (offset, length) of the index as recorded in the trailer."""
    offset, length, _, _ = TRAILER.unpack(data[-TRAILER.size :])
    return offset, length


def reseal(data: bytes, index: bytes) -> bytes:
    """Replace the index with `index` and rewrite the trailer so its CRC and length match."""
    offset, _ = locate_index(data)
    mark = data[-4:]
    return data[:offset] + index + TRAILER.pack(offset, len(index), zlib.crc32(index), mark)


def first_record_fields_at(data: bytes) -> int:
    """Byte position, inside the index, of the first record's fixed fields (after its path)."""
    offset, _ = locate_index(data)
    (path_length,) = struct.unpack_from("<H", data, offset + 4)
    return 4 + 2 + path_length


def single_entry_archive(tmp_path: Path, version: int = 2) -> tuple[Path, bytes]:
    """Write an archive holding one stored entry (by default with version 2's fixed-width
    index, whose fields the crafting tests overwrite in place); return its path and bytes."""
    dest = write_sample(tmp_path, [stored("aa/x.png", "L", 2, 2, 1)], version)
    return dest, dest.read_bytes()


def number(value: int) -> bytes:
    """FORMAT.md's variable-length number: 7 bits a byte, low first, high bit = more."""
    out = b""
    while value > 0x7F:
        out += bytes([value & 0x7F | 0x80])
        value >>= 7
    return out + bytes([value])


def packed_record(path: bytes, mode: int, method: int, width: int, height: int,
                  checksum: bytes, length: int) -> bytes:
    """One version-3 index record, packed as FORMAT.md says."""
    return (number(len(path)) + path + bytes([mode, method]) + number(width) + number(height)
            + checksum + number(length))


def packed_index(records: bytes, count: int = 1, length: int | None = None) -> bytes:
    """A version-3 index: count, the records' length, the records deflated."""
    length = len(records) if length is None else length
    return struct.pack("<II", count, length) + zlib.compress(records)


def test_modes_and_methods_have_the_agreed_codes() -> None:
    """Mode and method codes are part of the format and must not drift."""
    assert MODES["L"] == 1
    assert MODES["RGB"] == 2
    assert METHODS == {"stored": 0, "model": 1, "tuned": 2, "adaptive": 3}


def test_round_trip_keeps_every_field_and_payload(tmp_path: Path) -> None:
    """Everything written comes back from the index and payload reads, in order."""
    dest = tmp_path / "a.rca"
    size = write_archive(dest, MODEL, iter(SAMPLE))
    assert size == dest.stat().st_size
    model, entries = read_index(dest)
    assert model == MODEL
    assert [e.path for e in entries] == [e.path for e in SAMPLE]
    for written, listed in zip(SAMPLE, entries, strict=True):
        assert (listed.mode, listed.width, listed.height) == (
            written.mode,
            written.width,
            written.height,
        )
        assert listed.method == written.method
        assert listed.checksum == written.checksum
        assert listed.length == len(written.payload)
        assert read_payload(dest, listed) == written.payload


def test_empty_archive_round_trips(tmp_path: Path) -> None:
    """An archive with no entries is valid and lists nothing."""
    dest = write_sample(tmp_path, [])
    assert read_index(dest) == (MODEL, [])


def test_one_payload_is_read_alone_by_seeking(tmp_path: Path) -> None:
    """An index entry's offset and length locate exactly its payload bytes."""
    dest = write_sample(tmp_path)
    _, entries = read_index(dest)
    wanted = entries[3]
    raw = dest.read_bytes()
    assert raw[wanted.offset : wanted.offset + wanted.length] == SAMPLE[3].payload
    assert read_payload(dest, wanted) == SAMPLE[3].payload


def test_paths_are_stored_normalised(tmp_path: Path) -> None:
    """The writer stores the canonical (NFC, POSIX) form of each path."""
    decomposed = unicodedata.normalize("NFD", "café/./b.png")
    dest = write_sample(tmp_path, [stored(decomposed, "L", 1, 1, 0)])
    _, entries = read_index(dest)
    assert entries[0].path == unicodedata.normalize("NFC", "café/b.png")


def test_failure_mid_iteration_leaves_no_file_behind(tmp_path: Path) -> None:
    """An exception from the entry source leaves neither dest nor a temporary file."""

    def entries() -> Iterator[Entry]:
        yield SAMPLE[0]
        yield SAMPLE[1]
        raise RuntimeError("source image vanished")

    dest = tmp_path / "out.rca"
    with pytest.raises(RuntimeError, match="vanished"):
        write_archive(dest, MODEL, entries())
    assert list(tmp_path.iterdir()) == []


def test_invalid_entry_mid_stream_leaves_no_file_behind(tmp_path: Path) -> None:
    """A refused entry after some were written also leaves nothing behind."""
    dest = tmp_path / "out.rca"
    with pytest.raises(ArchiveError, match="duplicate path"):
        write_archive(dest, MODEL, [SAMPLE[0], SAMPLE[1], SAMPLE[0]])
    assert list(tmp_path.iterdir()) == []


def test_failed_overwrite_keeps_the_old_archive(tmp_path: Path) -> None:
    """A failed forced write leaves the existing archive untouched."""
    dest = write_sample(tmp_path)
    before = dest.read_bytes()
    with pytest.raises(ArchiveError):
        write_archive(dest, MODEL, [stored("/abs.png", "L", 1, 1, 0)], force=True)
    assert dest.read_bytes() == before
    assert list(tmp_path.iterdir()) == [dest]


def test_existing_destination_is_refused_without_force(tmp_path: Path) -> None:
    """An existing destination is never overwritten without force."""
    dest = tmp_path / "keep.rca"
    dest.write_bytes(b"precious")
    with pytest.raises(ArchiveError, match=r"keep\.rca: already exists"):
        write_archive(dest, MODEL, SAMPLE)
    assert dest.read_bytes() == b"precious"


@pytest.mark.skipif(os.name != "posix", reason="POSIX file modes")
@pytest.mark.parametrize("umask", [0o022, 0o077])
def test_an_archive_gets_the_mode_of_any_new_file(tmp_path: Path, umask: int) -> None:
    """Like a file that open() creates (0o666 less the umask, POSIX), not the private
    0o600 of the temporary file it was written through; the umask is left as it was."""
    before = os.umask(umask)
    try:
        dest = tmp_path / "shared.rca"
        write_archive(dest, MODEL, SAMPLE)
        plain = tmp_path / "plain"
        plain.write_bytes(b"")
        assert os.umask(umask) == umask
    finally:
        os.umask(before)
    assert stat.S_IMODE(dest.stat().st_mode) == stat.S_IMODE(plain.stat().st_mode)
    assert stat.S_IMODE(dest.stat().st_mode) == 0o666 & ~umask


def test_force_overwrites_the_destination(tmp_path: Path) -> None:
    """With force, the destination is replaced by the new archive."""
    dest = tmp_path / "keep.rca"
    dest.write_bytes(b"stale")
    write_archive(dest, MODEL, SAMPLE, force=True)
    assert len(read_index(dest)[1]) == len(SAMPLE)


@pytest.mark.parametrize(
    ("given", "expected"),
    [
        ("a/b.png", "a/b.png"),
        ("./a//b.png", "a/b.png"),
        ("a/./b/", "a/b"),
        (unicodedata.normalize("NFD", "é.png"), "\u00e9.png"),
    ],
)
def test_normalise_path_accepts_relative_paths(given: str, expected: str) -> None:
    """Relative paths are reduced to their canonical form."""
    assert normalise_path(given) == expected


@pytest.mark.parametrize(
    "bad",
    ["/abs.png", "../x.png", "a/../../x", "a/../b", "", ".", "a\\b", "a\x00b", "a\nb", "C:/x"],
)
def test_normalise_path_refuses_unsafe_paths(bad: str) -> None:
    """Unsafe or empty paths are refused with a one-line message naming them."""
    with pytest.raises(ArchiveError) as caught:
        normalise_path(bad)
    assert caught.value.args[0].startswith(repr(bad))
    assert "\n" not in caught.value.args[0]


def test_paths_equal_after_normalisation_are_duplicates(tmp_path: Path) -> None:
    """Two spellings of one canonical path count as a duplicate."""
    with pytest.raises(ArchiveError, match="duplicate path 'a/b.png'"):
        write_sample(
            tmp_path, [stored("a/b.png", "L", 1, 1, 0), stored("./a//b.png", "L", 1, 1, 0)]
        )


@pytest.mark.parametrize(
    ("entry", "reason"),
    [
        (stored("../x.png", "L", 1, 1, 0), r"'\.\.' component"),
        (Entry("x", "CMYK", 1, 1, "stored", bytes(32), b"\0"), "unknown mode"),
        (Entry("x", "L", 1, 1, "zip", bytes(32), b"\0"), "unknown method"),
        (Entry("x", "L", 0, 1, "stored", bytes(32), b""), "width 0"),
        (Entry("x", "L", 1, -1, "stored", bytes(32), b""), "height -1"),
        (Entry("x", "L", 1, 1, "stored", bytes(31), b"\0"), "checksum is 31 bytes"),
        (Entry("x", "RGB", 2, 1, "stored", bytes(32), b"\0" * 5), "expected 6"),
        (Entry("x", "RGB", 2, 1, "model", bytes(32), b"\0" * 5), "32-bit words"),
        (Entry("x", "RGB", 2, 1, "tuned", bytes(32), b"\0" * 8), "tuning header"),
        (Entry("x", "RGB", 2, 1, "adaptive", bytes(32), b"\0" * 17), "18-byte tuning header"),
        (Entry("x", "RGB", 2, 1, "adaptive", bytes(32), b"\0" * 20), "18-byte tuning header"),
    ],
)
def test_writer_refuses_invalid_entries(tmp_path: Path, entry: Entry, reason: str) -> None:
    """Each invalid entry field is refused with its reason and no file is left."""
    with pytest.raises(ArchiveError, match=reason):
        write_sample(tmp_path, [entry])
    assert list(tmp_path.iterdir()) == []


@pytest.mark.parametrize(
    ("model", "reason"),
    [
        (ModelIdentity("m" * 256, bytes(32)), "longer than 255"),
        (ModelIdentity("m", bytes(31)), "SHA-256 is 31 bytes"),
    ],
)
def test_writer_refuses_invalid_model_identity(
    tmp_path: Path, model: ModelIdentity, reason: str
) -> None:
    """A model name over 255 bytes or a digest of the wrong size is refused."""
    with pytest.raises(ArchiveError, match=reason):
        write_archive(tmp_path / "m.rca", model, SAMPLE)
    assert list(tmp_path.iterdir()) == []


def test_every_truncation_is_reported_as_archive_error(tmp_path: Path) -> None:
    """Cutting the file at any length gives ArchiveError naming the file."""
    data = write_sample(tmp_path).read_bytes()
    cut = tmp_path / "cut.rca"
    for length in range(len(data)):
        cut.write_bytes(data[:length])
        with pytest.raises(ArchiveError) as caught:
            read_index(cut)
        assert caught.value.args[0].startswith(f"{cut}: ")


def test_payload_read_after_truncation_fails_cleanly(tmp_path: Path) -> None:
    """A payload read from a truncated archive is refused, not short."""
    dest = write_sample(tmp_path)
    _, entries = read_index(dest)
    dest.write_bytes(dest.read_bytes()[:-1])
    with pytest.raises(ArchiveError, match="truncated"):
        read_payload(dest, entries[0])


def test_flipped_index_byte_fails_the_crc(tmp_path: Path) -> None:
    """Damage inside the index is caught by its CRC32."""
    dest = write_sample(tmp_path)
    data = bytearray(dest.read_bytes())
    offset, length = locate_index(bytes(data))
    data[offset + length // 2] ^= 0x10
    dest.write_bytes(bytes(data))
    with pytest.raises(ArchiveError, match="index CRC mismatch"):
        read_index(dest)


def test_flipped_model_name_byte_fails_the_header_crc(tmp_path: Path) -> None:
    """Damage to the model identity is caught by the header CRC32."""
    dest = write_sample(tmp_path)
    data = bytearray(dest.read_bytes())
    data[45] ^= 0x01  # first byte of the model name
    dest.write_bytes(bytes(data))
    with pytest.raises(ArchiveError, match="header CRC mismatch"):
        read_index(dest)


def test_wrong_magic_is_not_an_archive(tmp_path: Path) -> None:
    """A file without our magic bytes is refused as not an archive."""
    dest = write_sample(tmp_path)
    dest.write_bytes(b"NOTOURS!" + dest.read_bytes()[8:])
    with pytest.raises(ArchiveError, match=r"^.*sample\.rca: not a rowcast archive$"):
        read_index(dest)


def test_unknown_version_is_refused_by_number(tmp_path: Path) -> None:
    """Readers refuse other format versions and say which version they found."""
    dest = write_sample(tmp_path)
    data = dest.read_bytes()
    dest.write_bytes(data[:8] + struct.pack("<H", 7) + data[10:])
    with pytest.raises(ArchiveError, match=f"^{dest}: unsupported format version 7"):
        read_index(dest)
    with pytest.raises(ArchiveError, match="unsupported format version 7"):
        read_payload(dest, IndexEntry("x", "L", 1, 1, "stored", bytes(32), 60, 1))


def claim_version(path: Path, version: int) -> None:
    """Rewrite an archive's format version, with a header CRC that matches it."""
    data = bytearray(path.read_bytes())
    data[8:10] = struct.pack("<H", version)
    end = 45 + len(MODEL.name.encode())
    data[end : end + 4] = struct.pack("<I", zlib.crc32(bytes(data[:end])))
    path.write_bytes(bytes(data))


def test_version_1_archives_hold_only_the_methods_of_version_1(tmp_path: Path) -> None:
    """Writers may still write version 1 (what rowcast 0.1 reads) when no entry is tuned;
    a tuned entry needs version 2, and a version-1 file that claims one is refused."""
    dest = tmp_path / "old.rca"
    write_archive(dest, MODEL, SAMPLE, version=1)
    assert struct.unpack("<H", dest.read_bytes()[8:10]) == (1,)
    assert [e.path for e in read_index(dest)[1]] == [e.path for e in SAMPLE]
    tuned = Entry("t.png", "RGB", 5, 4, "tuned", bytes(32), bytes(16))
    with pytest.raises(ArchiveError, match="needs a newer format version"):
        write_archive(tmp_path / "no.rca", MODEL, [tuned], version=1)
    assert not (tmp_path / "no.rca").exists()
    new = tmp_path / "new.rca"
    write_archive(new, MODEL, [tuned], version=2)
    assert struct.unpack("<H", new.read_bytes()[8:10]) == (2,)
    assert read_index(new)[1][0].method == "tuned"
    claim_version(new, 1)
    with pytest.raises(ArchiveError, match="'tuned' is not defined in format version 1"):
        read_index(new)


def test_adaptive_entries_need_version_4_and_an_18_byte_header(tmp_path: Path) -> None:
    """An adaptive payload is its 18-byte header and whole words; version 3 cannot hold
    one (rowcast 0.3 would not know the method) and a version-3 file claiming one is
    refused; version 4 keeps it."""
    adaptive = Entry("a.png", "RGB", 5, 4, "adaptive", bytes(32), bytes(18 + 8))
    with pytest.raises(ArchiveError, match="needs a newer format version"):
        write_archive(tmp_path / "no.rca", MODEL, [adaptive], version=3)
    assert not (tmp_path / "no.rca").exists()
    new = tmp_path / "new.rca"
    write_archive(new, MODEL, [adaptive])
    assert read_index(new)[1][0].method == "adaptive"
    assert read_payload(new, read_index(new)[1][0]) == adaptive.payload
    claim_version(new, 3)
    with pytest.raises(ArchiveError, match="'adaptive' is not defined in format version 3"):
        read_index(new)


def test_nonzero_header_flags_are_refused(tmp_path: Path) -> None:
    """Flags this version does not define are refused, even with a valid CRC."""
    dest = write_sample(tmp_path)
    data = bytearray(dest.read_bytes())
    data[10] = 1
    end = 45 + len(MODEL.name.encode())
    data[end : end + 4] = struct.pack("<I", zlib.crc32(bytes(data[:end])))
    dest.write_bytes(bytes(data))
    with pytest.raises(ArchiveError, match="unsupported header flags 0x0001"):
        read_index(dest)


def test_crafted_length_past_the_payload_area_is_refused(tmp_path: Path) -> None:
    """A payload length reaching beyond the payload area is refused."""
    dest, data = single_entry_archive(tmp_path)
    offset, length = locate_index(data)
    index = bytearray(data[offset : offset + length])
    fields = first_record_fields_at(data)
    values = list(RECORD_FIELDS.unpack_from(index, fields))
    values[1] = METHODS["model"]
    values[6] = 2**40
    RECORD_FIELDS.pack_into(index, fields, *values)
    dest.write_bytes(reseal(data, bytes(index)))
    with pytest.raises(ArchiveError, match="past the payload area"):
        read_index(dest)


def test_payload_outside_the_payload_area_is_not_read(tmp_path: Path) -> None:
    """read_payload refuses offsets and lengths outside the payload area."""
    dest = write_sample(tmp_path)
    _, entries = read_index(dest)
    size = dest.stat().st_size
    for offset, length in [(size - 4, 8), (0, 4), (entries[0].offset, -1), (size, 0)]:
        forged = IndexEntry("x", "RGB", 1, 1, "model", bytes(32), offset, length)
        with pytest.raises(ArchiveError, match="outside the payload area"):
            read_payload(dest, forged)


@pytest.mark.parametrize(
    ("path", "reason"), [(b"../x.png", "'..' component"), (b"/a/x.png", "absolute path")]
)
def test_crafted_unsafe_path_in_index_is_refused(tmp_path: Path, path: bytes, reason: str) -> None:
    """Unsafe paths in a well-sealed index are refused by the reader."""
    dest, data = single_entry_archive(tmp_path)
    offset, length = locate_index(data)
    index = data[offset : offset + length].replace(b"aa/x.png", path)
    dest.write_bytes(reseal(data, index))
    with pytest.raises(ArchiveError, match=reason):
        read_index(dest)


def test_crafted_non_canonical_path_in_index_is_refused(tmp_path: Path) -> None:
    """Stored paths must already be canonical."""
    dest, data = single_entry_archive(tmp_path)
    offset, length = locate_index(data)
    index = data[offset : offset + length].replace(b"aa/x.png", b"a//x.png")
    dest.write_bytes(reseal(data, index))
    with pytest.raises(ArchiveError, match="not in canonical form"):
        read_index(dest)


@pytest.mark.parametrize(
    ("field", "code", "reason"), [(0, 9, "unknown mode code 9"), (1, 5, "method code 5")]
)
def test_crafted_unknown_codes_are_refused(
    tmp_path: Path, field: int, code: int, reason: str
) -> None:
    """Mode and method codes this version does not define are refused."""
    dest, data = single_entry_archive(tmp_path)
    offset, length = locate_index(data)
    index = bytearray(data[offset : offset + length])
    index[first_record_fields_at(data) + field] = code
    dest.write_bytes(reseal(data, bytes(index)))
    with pytest.raises(ArchiveError, match=reason):
        read_index(dest)


def test_absurd_entry_count_is_refused_before_parsing(tmp_path: Path) -> None:
    """An entry count too large for the index is refused up front."""
    dest, data = single_entry_archive(tmp_path)
    offset, length = locate_index(data)
    index = struct.pack("<I", 2**32 - 1) + data[offset + 4 : offset + length]
    dest.write_bytes(reseal(data, index))
    with pytest.raises(ArchiveError, match="entry count 4294967295 cannot fit"):
        read_index(dest)


def test_every_single_byte_flip_is_caught_or_harmless(tmp_path: Path) -> None:
    """Any single damaged byte yields ArchiveError or a clean read, never a crash."""
    original = write_sample(tmp_path, SAMPLE[1:4]).read_bytes()
    damaged = tmp_path / "damaged.rca"
    outcomes = {"read": 0, "refused": 0}
    for position in range(len(original)):
        for mask in (0x01, 0x80, 0xFF):
            data = bytearray(original)
            data[position] ^= mask
            damaged.write_bytes(bytes(data))
            try:
                read_everything(damaged)
            except ArchiveError as error:
                assert error.args[0].startswith(f"{damaged}: ")
                assert "\n" not in error.args[0]
                outcomes["refused"] += 1
            else:
                outcomes["read"] += 1
    assert outcomes["refused"] > 0
    assert outcomes["read"] > 0  # payload bytes carry no CRC here; the pixel checksum guards them


def test_version_3_packs_the_index_and_lists_the_same_entries(tmp_path: Path) -> None:
    """Version 3 holds the same entries, offsets and payloads as version 2, with an index of
    variable-length numbers, no offsets, deflated by zlib (the index bytes are checked
    against an independent packing of FORMAT.md's layout); version 6, what writers write
    unless told otherwise, lays them out as version 3 does."""
    entries = SAMPLE + [stored(f"orchard/cam{i:02d}/2026-11-30T06-00.png", "L", 2, 2, i)
                        for i in range(12)]
    (tmp_path / "v2").mkdir()
    (tmp_path / "v3").mkdir()
    old = write_sample(tmp_path / "v2", entries, version=2)
    new = tmp_path / "v3" / "sample.rca"
    write_archive(new, MODEL, entries, version=3)
    assert struct.unpack("<H", new.read_bytes()[8:10]) == (3,)
    newest = tmp_path / "v6.rca"
    write_archive(newest, MODEL, entries)
    assert struct.unpack("<H", newest.read_bytes()[8:10]) == (6,)
    assert read_index(newest) == read_index(new)
    four, three = newest.read_bytes(), new.read_bytes()
    (at4, size4), (at3, size3) = locate_index(four), locate_index(three)
    assert four[at4 : at4 + size4] == three[at3 : at3 + size3]
    assert read_index(new) == read_index(old)
    for entry in read_index(new)[1]:
        assert read_payload(new, entry) == read_payload(old, entry)
    data = new.read_bytes()
    offset, length = locate_index(data)
    assert offset == locate_index(old.read_bytes())[0]  # payloads in the same places
    records = b"".join(packed_record(normalise_path(e.path).encode(), MODES[e.mode],
                                     METHODS[e.method], e.width, e.height, e.checksum,
                                     len(e.payload)) for e in entries)
    index = data[offset : offset + length]
    assert index[:8] == struct.pack("<II", len(entries), len(records))
    assert zlib.decompress(index[8:]) == records
    assert length < 0.6 * locate_index(old.read_bytes())[1]


@pytest.mark.parametrize(
    ("records", "count", "length", "reason"),
    [
        (packed_record(b"../x.png", 1, 0, 2, 2, bytes(32), 4), 1, None, "'..' component"),
        (packed_record(b"a//x.png", 1, 0, 2, 2, bytes(32), 4), 1, None, "canonical form"),
        (packed_record(b"aa/x.png", 9, 0, 2, 2, bytes(32), 4), 1, None, "mode code 9"),
        (packed_record(b"aa/x.png", 2, 1, 2, 2, bytes(32), 2**40), 1, None,
         "past the payload area"),
        (packed_record(b"aa/x.png", 1, 0, 0, 2, bytes(32), 0), 1, None, "width 0"),
        (b"\x88\x00aa/x.png" + bytes(37), 1, None, "malformed number"),
        (b"\x08aa/x.png\x01\x00" + b"\xff" * 11 + bytes(32), 1, None, "malformed number"),
        (packed_record(b"aa/x.png", 1, 0, 2, 2, bytes(32), 4) + b"\0", 1, None,
         "trailing bytes in index"),
        (packed_record(b"aa/x.png", 1, 0, 2, 2, bytes(32), 4), 2, None, "cannot fit"),
        (packed_record(b"aa/x.png", 1, 0, 2, 2, bytes(32), 4), 1, 60, "stated length"),
        (packed_record(b"aa/x.png", 1, 0, 2, 2, bytes(32), 4), 1, 2**31, "cannot come from"),
        (packed_record(b"aa/x.png", 1, 0, 2, 2, bytes(32), 4), 2**32 - 1, 2**32 - 1,
         "entry count 4294967295 cannot fit"),
    ],
)
def test_crafted_packed_indexes_are_refused(tmp_path: Path, records: bytes, count: int,
                                            length: int | None, reason: str) -> None:
    """A well-sealed version-3 index whose records break a reading rule is refused, and
    lengths that do not add up are refused before anything large is inflated."""
    dest, data = single_entry_archive(tmp_path, version=3)
    dest.write_bytes(reseal(data, packed_index(records, count, length)))
    with pytest.raises(ArchiveError, match=reason):
        read_index(dest)


def test_a_packed_index_that_does_not_inflate_is_refused(tmp_path: Path) -> None:
    """Bytes that are not a zlib stream, or a stream cut short, are refused by name."""
    dest, data = single_entry_archive(tmp_path, version=3)
    good = packed_index(packed_record(b"aa/x.png", 1, 0, 2, 2, bytes(32), 4))
    for index, reason in [(good[:8] + b"not zlib at all", "does not inflate"),
                          (good[:-3], "does not inflate to its stated length"),
                          (good + b"\0", "does not inflate to its stated length"),
                          (packed_index(bytes(10**6), count=0, length=0),
                           "does not inflate to its stated length")]:
        dest.write_bytes(reseal(data, index))
        with pytest.raises(ArchiveError, match=reason):
            read_index(dest)


def test_a_gray_entrys_tuning_header_is_compact_from_version_5(tmp_path: Path) -> None:
    """From format version 5 a gray entry's tuned payload is a 4-byte header plus whole
    words (adaptive: 5 bytes), while RGB entries keep 16 (18); version 4 keeps the full
    header for both. Each writer refuses the other's gray lengths, and the reader records
    the version that fixes the layout."""
    compact = [Entry("g.png", "L", 2, 2, "tuned", bytes(32), b"\0" * 8),
               Entry("a.png", "L", 2, 2, "adaptive", bytes(32), b"\0" * 9),
               Entry("c.png", "RGB", 2, 2, "tuned", bytes(32), b"\0" * 20)]
    write_archive(tmp_path / "v5.rca", MODEL, compact, version=5)
    _, entries = read_index(tmp_path / "v5.rca")
    assert [(e.length, e.version) for e in entries] == [(8, 5), (9, 5), (20, 5)]
    with pytest.raises(ArchiveError, match="16-byte tuning header"):
        write_archive(tmp_path / "v4.rca", MODEL, compact, version=4)
    full = [Entry("g.png", "L", 2, 2, "adaptive", bytes(32), b"\0" * 22)]
    write_archive(tmp_path / "v4.rca", MODEL, full, version=4)
    assert read_index(tmp_path / "v4.rca")[1][0].version == 4
    with pytest.raises(ArchiveError, match="5-byte tuning header"):
        write_archive(tmp_path / "full.rca", MODEL, full, version=5)
    assert not (tmp_path / "full.rca").exists()


def test_a_coded_payload_is_any_number_of_bytes_from_version_6(tmp_path: Path) -> None:
    """From format version 6 a coded payload is one range code, its tuning inside and its
    ending trimmed to whole bytes: any length is valid (even none: a code of zeros), while
    versions before 6 refuse what is not whole 32-bit words after the header. The reader
    records version 6, which fixes the layout (`payload_layout`)."""
    odd = [Entry("g.png", "L", 2, 2, "tuned", bytes(32), b"\1" * 3),
           Entry("a.png", "RGB", 2, 2, "adaptive", bytes(32), b"\1" * 7),
           Entry("m.png", "RGB", 2, 2, "model", bytes(32), b"")]
    write_archive(tmp_path / "v6.rca", MODEL, odd)
    _, entries = read_index(tmp_path / "v6.rca")
    assert [(e.length, e.version) for e in entries] == [(3, 6), (7, 6), (0, 6)]
    assert [payload_layout(v) for v in (1, 4, 5, 6)] == ["full", "full", "compact", "streamed"]
    with pytest.raises(ArchiveError, match="not whole 32-bit words"):
        write_archive(tmp_path / "v5.rca", MODEL, odd, version=5)
    assert not (tmp_path / "v5.rca").exists()
