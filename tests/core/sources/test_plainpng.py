"""Plain 8-bit PNG files read from their chunks agree with Pillow, and everything else is left
to Pillow.

Reference: Pillow's own PNG reader (``Image.open``, its mode, size and pixels) on files Pillow
writes; the unusual files are made here by hand from the chunk layout of the PNG specification
(3rd edition, section 5.3: length, type, data, CRC-32 from zlib).
"""

from __future__ import annotations

import io
import struct
import zlib
from pathlib import Path

import numpy as np
import pytest
from PIL import Image, PngImagePlugin

from modescope.core.sources import decode, headers
from modescope.core.sources.decode import iter_blocks
from modescope.core.sources.plainpng import plain_png
from modescope.core.sources.scan import scan_sources

_RNG = np.random.default_rng(7)


def _chunk(kind: bytes, data: bytes) -> bytes:
    return (struct.pack(">I", len(data)) + kind + data
            + struct.pack(">I", zlib.crc32(kind + data) & 0xFFFFFFFF))


def _pillow_png(mode: str, rows: int = 9, cols: int = 13, **save) -> bytes:
    shape = {"L": (rows, cols), "RGB": (rows, cols, 3), "RGBA": (rows, cols, 4),
             "LA": (rows, cols, 2), "P": (rows, cols)}[mode]
    values = _RNG.integers(0, 256, shape, dtype=np.uint8)
    img = Image.fromarray(values, mode="L" if mode == "P" else None)
    if mode == "P":
        img = img.convert("P")
    elif img.mode != mode:
        img = Image.fromarray(values).convert(mode)
    buf = io.BytesIO()
    img.save(buf, "PNG", **save)
    return buf.getvalue()


def _write(path: Path, data: bytes) -> str:
    path.write_bytes(data)
    return str(path)


@pytest.mark.parametrize("mode", ["L", "RGB", "RGBA", "LA", "P"])
@pytest.mark.parametrize("save", [{}, {"compress_level": 0}, {"optimize": True},
                                  {"dpi": (300, 300)}])
def test_header_and_pixels_match_pillow(tmp_path, mode, save):
    path = _write(tmp_path / "a.png", _pillow_png(mode, **save))
    with Image.open(path) as img:                          # reference: Pillow's reader
        want_mode, (cols, rows) = img.mode, img.size
        want = np.asarray(img)
    assert want_mode == mode
    assert plain_png(path) == (rows, cols, mode)
    found = plain_png(path, pixels=True)
    if mode == "P":
        assert found is None                               # the palette goes through Pillow
        return
    assert found[:3] == (rows, cols, mode)
    assert found[3].dtype == np.uint8
    np.testing.assert_array_equal(found[3], want)


def test_big_image_data_in_many_chunks(tmp_path):
    # Pillow writes the image data in several IDAT chunks once it exceeds its block size
    path = _write(tmp_path / "big.png", _pillow_png("RGB", rows=300, cols=400,
                                                    compress_level=0))
    data = Path(path).read_bytes()
    assert data.count(b"IDAT") > 1
    with Image.open(path) as img:
        want = np.asarray(img)
    assert plain_png(path) == (300, 400, "RGB")            # header read past the first 4 KiB
    np.testing.assert_array_equal(plain_png(path, pixels=True)[3], want)


def _with_chunk_before_data(data: bytes, chunk: bytes) -> bytes:
    return data[:33] + chunk + data[33:]


def _exif_payload() -> bytes:
    exif = Image.Exif()
    exif[0x0112] = 6
    return exif.tobytes()[len(b"Exif\x00\x00"):]


def _left_to_pillow() -> dict:
    plain = _pillow_png("L")
    info = PngImagePlugin.PngInfo()
    info.add_text("note", "hello")
    bad_ihdr = bytearray(plain)
    bad_ihdr[20] ^= 1                                      # a byte of the width
    bad_phys = bytearray(_pillow_png("L", dpi=(72, 72)))
    at = bytes(bad_phys).index(b"pHYs")
    bad_phys[at + 5] ^= 1                                  # a byte of its data
    sixteen = io.BytesIO()
    Image.fromarray(np.arange(117, dtype=np.uint16).reshape(9, 13) * 500).save(sixteen, "PNG")
    jpeg = io.BytesIO()
    Image.fromarray(np.zeros((9, 13), np.uint8)).save(jpeg, "JPEG")
    idat = plain.index(b"IDAT") - 4
    return {
        "text chunk": _pillow_png("L", pnginfo=info),
        "eXIf before the data": _with_chunk_before_data(plain, _chunk(b"eXIf", _exif_payload())),
        "eXIf after the data": plain[:-12] + _chunk(b"eXIf", _exif_payload()) + plain[-12:],
        "16-bit samples": sixteen.getvalue(),
        "damaged IHDR": bytes(bad_ihdr),
        "damaged chunk before the data": bytes(bad_phys),
        "no IEND": plain[:-12],
        "cut inside the data": plain[:idat + 20],
        "a JPEG file": jpeg.getvalue(),
        "empty": b"",
    }


@pytest.mark.parametrize("case", sorted(_left_to_pillow()))
def test_unusual_files_are_left_to_pillow(tmp_path, case):
    path = _write(tmp_path / "odd.png", _left_to_pillow()[case])
    assert plain_png(path) is None
    assert plain_png(path, pixels=True) is None


def test_interlaced_header_only(tmp_path):
    # Adam7: the size and mode are plain, the rows are left to Pillow's reader
    values = _RNG.integers(0, 256, (9, 13), dtype=np.uint8)
    buf = io.BytesIO()
    Image.fromarray(values).save(buf, "PNG")
    data = bytearray(buf.getvalue())
    raw = zlib.decompress(bytes(data[data.index(b"IDAT") + 4:-16]))
    assert len(raw) == 9 * 14                              # one filter byte per row
    # rewrite as interlaced: each Adam7 pass' rows, filter byte 0
    passes = [(0, 0, 8, 8), (0, 4, 8, 8), (4, 0, 8, 4), (0, 2, 4, 4), (2, 0, 4, 2), (0, 1, 2, 2),
              (1, 0, 2, 1)]
    rows_out = b""
    for r0, c0, dr, dc in passes:
        sub = values[r0::dr, c0::dc]
        if sub.size:
            rows_out += b"".join(b"\0" + row.tobytes() for row in sub)
    ihdr = struct.pack(">IIBBBBB", 13, 9, 8, 0, 0, 0, 1)
    png = (b"\x89PNG\r\n\x1a\n" + _chunk(b"IHDR", ihdr) + _chunk(b"IDAT", zlib.compress(rows_out))
           + _chunk(b"IEND", b""))
    path = _write(tmp_path / "adam7.png", png)
    with Image.open(path) as img:                          # reference: Pillow's reader
        np.testing.assert_array_equal(np.asarray(img), values)
    assert plain_png(path) == (9, 13, "L")
    assert plain_png(path, pixels=True) is None


def test_above_the_pixel_limit_left_to_pillow(tmp_path, monkeypatch):
    path = _write(tmp_path / "a.png", _pillow_png("L"))
    monkeypatch.setattr(Image, "MAX_IMAGE_PIXELS", 50)
    assert plain_png(path) is None


def test_damaged_image_data_reported_with_pillows_reason(tmp_path):
    plain = bytearray(_pillow_png("L", rows=40, cols=40))
    start = plain.index(b"IDAT") + 4
    for i in range(start + 2, start + 40):
        plain[i] = 0xFF                                    # the zlib stream, not the CRC
    path = _write(tmp_path / "bad.png", bytes(plain))
    assert plain_png(path) == (40, 40, "L")                # the header is fine
    assert plain_png(path, pixels=True) is None
    sset = scan_sources([path])
    block = next(iter_blocks(sset))
    assert block.data.shape[1] == 0
    (problem,) = block.problems
    assert problem.reason.startswith("cannot be decoded (")


def test_collection_reads_alike_with_and_without_the_plain_reader(tmp_path, monkeypatch):
    # end to end: the scan's refs and the decoded blocks equal what Pillow's path gives
    for i, mode in enumerate(["L", "RGB", "RGBA", "LA", "P", "L"]):
        _write(tmp_path / f"img_{i}.png", _pillow_png(mode, rows=6, cols=7))
    for color in ("gray", "rgb"):
        fast = scan_sources([tmp_path], color=color)
        fast_blocks = [b.data.copy() for b in iter_blocks(fast, block_size=4)]
        with monkeypatch.context() as patch:
            patch.setattr(headers, "plain_png", lambda *a, **k: None)
            patch.setattr(decode, "plain_png", lambda *a, **k: None)
            slow = scan_sources([tmp_path], color=color)
            slow_blocks = [b.data.copy() for b in iter_blocks(slow, block_size=4)]
        assert fast.images == slow.images
        for a, b in zip(fast_blocks, slow_blocks, strict=True):
            np.testing.assert_array_equal(a, b)


def test_large_files_left_to_pillow_for_their_pixels(tmp_path, monkeypatch):
    # the whole file is held while it decodes: above the size limit Pillow's streaming reader
    # takes over (the header is still read from the chunks)
    from modescope.core.sources import plainpng
    path = _write(tmp_path / "a.png", _pillow_png("L", rows=40, cols=50))
    assert plain_png(path, pixels=True) is not None
    monkeypatch.setattr(plainpng, "_PIXEL_FILE_BYTES", Path(path).stat().st_size - 1)
    assert plain_png(path, pixels=True) is None
    assert plain_png(path) == (40, 50, "L")
