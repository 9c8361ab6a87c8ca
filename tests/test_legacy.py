"""Archives of formats 1 to 6 are read forever (docs/FORMAT.md, "Legacy formats 1-6"):
the committed golden archives, and archives built here byte by byte from FORMAT.md's
legacy tables to craft damage (rowcast no longer writes these formats)."""

from __future__ import annotations

import hashlib
import struct
import zlib
from pathlib import Path

import numpy as np
import pytest
from conftest import GOLDEN, assert_flips_refused
from PIL import Image

from rowcast.archive import (
    ArchiveError,
    IndexEntry,
    ModelIdentity,
    iter_index,
    read_extras,
    read_index,
    read_payload,
)
from rowcast.legacy import payload_layout
from rowcast.picture import checksum

TRAILER = struct.Struct("<QQI4s")
FIXED = struct.Struct("<BBII32sQQ")  # mode, method, width, height, checksum, offset, length
MODEL = ModelIdentity("old-model", hashlib.sha256(b"old").digest())
L, RGB = 1, 2  # the old mode codes
STORED, MODEL_CODED, TUNED, ADAPTIVE = 0, 1, 2, 3  # the old method codes

# (path, format, method, width, height, payload length) of each golden archive's entries
IMAGES = {"leaf.png": ("L", 9, 7), "orchard.png": ("RGB", 16, 12), "sky.png": ("RGB", 48, 40),
          "gate.png": ("L", 48, 40)}
FOLDERS = {"leaf.png": "images", "orchard.png": "images", "sky.png": "tuned",
           "gate.png": "gray"}
GOLDENS = {
    "golden.rowcast": (1, [("leaf.png", "model", 52), ("orchard.png", "model", 328)]),
    "golden-tuned.rowcast": (2, [("sky.png", "tuned", 2912)]),
    "golden-mixture.rowcast": (2, [("sky.png", "tuned", 3024)]),
    "golden-packed.rowcast": (3, [("leaf.png", "model", 52), ("orchard.png", "model", 328),
                                  ("sky.png", "tuned", 2912)]),
    "golden-adaptive.rowcast": (4, [("leaf.png", "model", 52), ("orchard.png", "model", 328),
                                    ("sky.png", "adaptive", 2870)]),
    "golden-retuned.rowcast": (4, [("leaf.png", "model", 52), ("orchard.png", "model", 328),
                                   ("sky.png", "adaptive", 2858)]),
    "golden-mixture-adaptive.rowcast": (4, [("sky.png", "adaptive", 2974)]),
    "golden-compact.rowcast": (5, [("leaf.png", "adaptive", 53), ("orchard.png", "model", 328),
                                   ("sky.png", "adaptive", 2858),
                                   ("gate.png", "adaptive", 1073)]),
    "golden-streamed.rowcast": (6, [("leaf.png", "adaptive", 48), ("orchard.png", "model", 328),
                                    ("sky.png", "adaptive", 2849),
                                    ("gate.png", "adaptive", 1070)]),
    "golden-mixture-streamed.rowcast": (6, [("sky.png", "adaptive", 2971),
                                            ("gate.png", "adaptive", 1120)]),
}


def committed_checksum(name: str) -> bytes:
    """The checksum of a committed image as Pillow (an independent reader) reads it:
    format 1-6 checksums are SHA-256 of the uint8 planes, `picture.checksum` without
    extras."""
    values = np.asarray(Image.open(GOLDEN / FOLDERS[name] / name))
    planes = values[None] if values.ndim == 2 else values.transpose(2, 0, 1)
    return checksum(planes, b"")


@pytest.mark.parametrize("name", sorted(GOLDENS))
def test_every_golden_archive_lists_its_entries(name: str) -> None:
    """Each committed archive's index reads through archive.read_index (which dispatches
    on the version it finds) as format 7's entries: images, no extras, the old method
    names, the layout their coded payloads have, and the committed images' checksums."""
    src = GOLDEN / name
    version, expected = GOLDENS[name]
    assert struct.unpack("<H", src.read_bytes()[8:10]) == (version,)
    model, entries = read_index(src)
    assert model.name.startswith("golden-tiny")
    assert [(e.path, e.method, e.length) for e in entries] == expected
    offset = entries[0].offset
    for entry in entries:
        fmt, width, height = IMAGES[entry.path]
        assert (entry.kind, entry.format, entry.width, entry.height) == ("image", fmt, width,
                                                                         height)
        assert (entry.extras_length, entry.restore_as, entry.reason, entry.carries,
                entry.parts) == (0, None, "", (), ())
        assert (entry.version, entry.layout) == (version, payload_layout(version))
        assert entry.checksum == committed_checksum(entry.path)
        assert entry.offset == offset
        offset += entry.length
        assert len(read_payload(src, entry)) == entry.length
        assert read_extras(src, entry) == b""
    assert list(iter_index(src)[1]) == entries


def test_payload_layouts_follow_the_version() -> None:
    """Formats 1-4 carry full tuning headers, 5 compact gray ones, 6 a streamed code."""
    assert [payload_layout(v) for v in range(1, 7)] == ["full"] * 4 + ["compact", "streamed"]


# ---- FORMAT.md's legacy layout, byte by byte ------------------------------------------


def num(value: int) -> bytes:
    """FORMAT.md's variable-length number."""
    out = b""
    while value > 0x7F:
        out += bytes([value & 0x7F | 0x80])
        value >>= 7
    return out + bytes([value])


def legacy_header(version: int, flags: int = 0) -> bytes:
    """Magic, version, flags, model SHA-256, name length, name, CRC32."""
    name = MODEL.name.encode()
    head = b"ROWCAST\xe5" + struct.pack("<HH32sB", version, flags, MODEL.sha256, len(name))
    return head + name + struct.pack("<I", zlib.crc32(head + name))


def packed_record(path: bytes, mode: int, method: int, width: int, height: int,
                  length: int, digest: bytes = bytes(32)) -> bytes:
    """One record of a packed index (versions 3 to 6)."""
    return (num(len(path)) + path + bytes([mode, method]) + num(width) + num(height) + digest
            + num(length))


def packed_index(records: bytes, count: int = 1, length: int | None = None) -> bytes:
    """Entry count, the records' length, the records deflated."""
    length = len(records) if length is None else length
    return struct.pack("<II", count, length) + zlib.compress(records)


def seal(head: bytes, payloads: bytes, index: bytes) -> bytes:
    """Header, payloads, index and a trailer whose CRC and lengths match."""
    return (head + payloads + index
            + TRAILER.pack(len(head) + len(payloads), len(index), zlib.crc32(index), b"RCIX"))


def fixed_archive(version: int, entries: list[tuple[bytes, int, int, int, int, int]],
                  count: int | None = None) -> bytes:
    """A version 1 or 2 archive of (path, mode, method, width, height, length) entries with
    zero payloads, fixed-width records with their offsets."""
    head = legacy_header(version)
    offset, records = len(head), b""
    for path, mode, method, width, height, length in entries:
        records += struct.pack("<H", len(path)) + path + FIXED.pack(
            mode, method, width, height, bytes(32), offset, length)
        offset += length
    index = struct.pack("<I", len(entries) if count is None else count) + records
    return seal(head, bytes(offset - len(head)), index)


def packed_archive(version: int, entries: list[tuple[bytes, int, int, int, int, int]]) -> bytes:
    """A version 3 to 6 archive of the same entries, with zero payloads."""
    records = b"".join(packed_record(*e) for e in entries)
    payloads = bytes(sum(e[5] for e in entries))
    return seal(legacy_header(version), payloads, packed_index(records, len(entries)))


def refused(tmp_path: Path, data: bytes, reason: str, **options) -> None:
    """Reading the index of these bytes is refused for `reason`, on one line naming the
    file."""
    src = tmp_path / "old.rowcast"
    src.write_bytes(data)
    with pytest.raises(ArchiveError, match=reason) as caught:
        read_index(src, **options)
    assert caught.value.args[0].startswith(f"{src}: ")
    assert "\n" not in caught.value.args[0]


def test_hand_built_archives_of_every_version_read(tmp_path: Path) -> None:
    """FORMAT.md's legacy layouts, built here, read as format 7 entries: "stored" is now
    "literal", and each version's method and payload-length rules hold (whole words after
    a 16- or 18-byte header before version 5, a gray header of 4 or 5 bytes in version
    5, any length from version 6)."""
    cases = {
        1: [(b"a.png", L, STORED, 2, 3, 6), (b"b.png", RGB, MODEL_CODED, 2, 2, 8)],
        2: [(b"a.png", RGB, TUNED, 2, 2, 20)],
        3: [(b"a.png", L, TUNED, 2, 2, 16), (b"s.png", RGB, STORED, 1, 1, 3)],
        4: [(b"a.png", L, ADAPTIVE, 2, 2, 22)],
        5: [(b"a.png", L, ADAPTIVE, 2, 2, 9), (b"b.png", L, TUNED, 2, 2, 4)],
        6: [(b"a.png", RGB, ADAPTIVE, 2, 2, 3), (b"b.png", L, MODEL_CODED, 2, 2, 0)],
    }
    names = {STORED: "literal", MODEL_CODED: "model", TUNED: "tuned", ADAPTIVE: "adaptive"}
    for version, entries in cases.items():
        src = tmp_path / f"v{version}.rowcast"
        build = fixed_archive if version < 3 else packed_archive
        src.write_bytes(build(version, entries))
        model, listed = read_index(src)
        assert model == MODEL
        start = len(legacy_header(version))
        expected = []
        for path, mode, method, width, height, length in entries:
            expected.append(IndexEntry(path.decode(), "image", {L: "L", RGB: "RGB"}[mode],
                                       width, height, names[method], bytes(32), start,
                                       length))
            start += length
        assert listed == expected
        assert {e.version for e in listed} == {version}


@pytest.mark.parametrize(("version", "entry", "reason"), [
    (1, (b"a.png", RGB, TUNED, 2, 2, 16), "'tuned' is not defined in format version 1"),
    (3, (b"a.png", RGB, ADAPTIVE, 2, 2, 18), "'adaptive' is not defined in format version 3"),
    (1, (b"a.png", RGB, STORED, 2, 1, 5), "stored payload is 5 bytes, expected 6"),
    (1, (b"a.png", RGB, MODEL_CODED, 2, 1, 5), "not whole 32-bit words"),
    (2, (b"a.png", RGB, TUNED, 2, 1, 8), "16-byte tuning header"),
    (4, (b"a.png", L, ADAPTIVE, 2, 1, 9), "18-byte tuning header"),
    (5, (b"a.png", L, ADAPTIVE, 2, 1, 22), "5-byte tuning header"),
    (5, (b"a.png", RGB, ADAPTIVE, 2, 1, 20), "18-byte tuning header"),
    (2, (b"a.png", 9, MODEL_CODED, 2, 1, 4), "unknown mode code 9"),
    (2, (b"a.png", L, 5, 2, 1, 4), "unknown method code 5"),
    (2, (b"a.png", L, MODEL_CODED, 0, 1, 4), "width 0"),
    (2, (b"../x.png", L, MODEL_CODED, 1, 1, 4), r"'\.\.' component"),
    (2, (b"/a/x.png", L, MODEL_CODED, 1, 1, 4), "absolute path"),
    (3, (b"a//x.png", L, MODEL_CODED, 1, 1, 4), "not in canonical form"),
    (6, (b"a.png", RGB, MODEL_CODED, 2**16, 2**12 + 1, 4), "exceed the limit of 268435456"),
])
def test_entries_that_break_their_versions_rules_are_refused(
        tmp_path: Path, version: int, entry: tuple, reason: str) -> None:
    """Each version keeps its own methods, payload lengths, codes, path rules, and sizes
    within the pixel limit."""
    build = fixed_archive if version < 3 else packed_archive
    refused(tmp_path, build(version, [entry]), reason)


def test_the_pixel_limit_is_a_parameter_for_old_archives_too(tmp_path: Path) -> None:
    """A reader given a higher limit lists an image that the default limit refuses."""
    src = tmp_path / "old.rowcast"
    src.write_bytes(packed_archive(6, [(b"a.png", RGB, MODEL_CODED, 2**16, 2**12 + 1, 4)]))
    assert read_index(src, pixel_limit=2**30)[1][0].width == 2**16
    refused(tmp_path, src.read_bytes(), "exceed the limit of 10", pixel_limit=10)


def test_duplicates_offsets_and_counts_of_fixed_indexes_are_checked(tmp_path: Path) -> None:
    """Versions 1 and 2 state each offset: it must be where the previous payload ended; a
    path may not repeat; the count must fit the index."""
    twice = [(b"a.png", L, STORED, 1, 1, 1)] * 2
    refused(tmp_path, fixed_archive(2, twice), "duplicate path 'a.png'")
    data = bytearray(fixed_archive(2, [(b"a.png", L, STORED, 1, 1, 1)]))
    offset = TRAILER.unpack(bytes(data[-TRAILER.size :]))[0]
    fields = offset + 4 + 2 + 5
    index = bytearray(data[offset : -TRAILER.size])
    record = list(FIXED.unpack_from(index, fields - offset))
    record[5] += 1
    FIXED.pack_into(index, fields - offset, *record)
    refused(tmp_path, seal(bytes(data[: offset - 1]), bytes(1), bytes(index)), "out of place")
    refused(tmp_path, fixed_archive(2, [(b"a.png", L, STORED, 1, 1, 1)], count=2**32 - 1),
            "entry count 4294967295 cannot fit")


@pytest.mark.parametrize(("records", "count", "length", "reason"), [
    (packed_record(b"aa/x.png", RGB, MODEL_CODED, 2, 2, 2**40), 1, None,
     "past the payload area"),
    (b"\x88\x00aa/x.png" + bytes(37), 1, None, "malformed number"),
    (b"\x08aa/x.png\x01\x00" + b"\xff" * 11 + bytes(32), 1, None, "malformed number"),
    (packed_record(b"aa/x.png", L, STORED, 2, 2, 4) + b"\0", 1, None, "trailing bytes"),
    (packed_record(b"aa/x.png", L, STORED, 2, 2, 4), 2, None, "cannot fit"),
    (packed_record(b"aa/x.png", L, STORED, 2, 2, 4), 1, 60, "stated length"),
    (packed_record(b"aa/x.png", L, STORED, 2, 2, 4), 1, 2**31, "cannot come from"),
])
def test_crafted_packed_indexes_are_refused(tmp_path: Path, records: bytes, count: int,
                                            length: int | None, reason: str) -> None:
    """A well-sealed packed index whose records break a reading rule is refused, and
    lengths that do not add up are refused before anything large is inflated."""
    refused(tmp_path, seal(legacy_header(3), bytes(4), packed_index(records, count, length)),
            reason)


def test_a_packed_index_that_does_not_inflate_is_refused(tmp_path: Path) -> None:
    """Bytes that are not a zlib stream, or a stream cut short or followed by more, are
    refused by name."""
    good = packed_index(packed_record(b"aa/x.png", L, STORED, 2, 2, 4))
    for index, reason in [(good[:8] + b"not zlib at all", "does not inflate"),
                          (good[:-3], "does not inflate to its stated length"),
                          (good + b"\0", "does not inflate to its stated length"),
                          (struct.pack("<II", 0, 0) + zlib.compress(bytes(10**6)),
                           "does not inflate to its stated length")]:
        refused(tmp_path, seal(legacy_header(3), bytes(4), index), reason)


def test_header_flags_and_crcs_are_checked(tmp_path: Path) -> None:
    """Flags no legacy version defines are refused even under a valid CRC; a damaged
    header or index fails its CRC32."""
    entries = [(b"a.png", L, STORED, 1, 1, 1)]
    good = packed_archive(4, entries)
    refused(tmp_path, seal(legacy_header(4, flags=1), bytes(1),
                           good[len(legacy_header(4)) + 1 : -TRAILER.size]),
            "unsupported header flags 0x0001")
    damaged = bytearray(good)
    damaged[45] ^= 1  # the model name's first byte
    refused(tmp_path, bytes(damaged), "header CRC mismatch")
    damaged = bytearray(good)
    damaged[-TRAILER.size - 3] ^= 1
    refused(tmp_path, bytes(damaged), "index CRC mismatch")


def test_every_truncation_of_a_golden_archive_is_refused(tmp_path: Path) -> None:
    """Cutting the oldest golden archive at any length gives ArchiveError naming the file."""
    data = (GOLDEN / "golden.rowcast").read_bytes()
    cut = tmp_path / "cut.rowcast"
    for length in range(len(data)):
        cut.write_bytes(data[:length])
        with pytest.raises(ArchiveError) as caught:
            read_index(cut)
        assert caught.value.args[0].startswith(f"{cut}: ")


@pytest.mark.parametrize("name", ["golden.rowcast", "golden-streamed.rowcast"])
def test_single_byte_flips_in_golden_archives_are_caught_or_harmless(tmp_path: Path,
                                                                     name: str) -> None:
    """A flipped byte of the header, index or trailer (every one, in the fixed and a
    packed layout) gives ArchiveError on one line; payload bytes read back as they are
    (the pixel checksum guards them when decoded)."""
    original = (GOLDEN / name).read_bytes()
    entries = read_index(GOLDEN / name)[1]
    first, end = entries[0].offset, entries[-1].offset + entries[-1].length
    damaged = tmp_path / "damaged.rowcast"
    assert_flips_refused(original, [*range(first), *range(end, len(original))], (0x01, 0xFF),
                         damaged, read_index)
    for position in range(first, end, 97):
        data = bytearray(original)
        data[position] ^= 0xFF
        damaged.write_bytes(bytes(data))
        assert read_index(damaged)[1] == entries
        assert b"".join(read_payload(damaged, e) for e in entries) == bytes(data[first:end])
