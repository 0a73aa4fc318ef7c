"""Every skipped or doubtful file is named with a plain reason, and Pillow prints nothing.

Every bad input is generated here: symbolic links (os.symlink), named pipes (os.mkfifo), a
PNG above a lowered Pillow pixel limit (Image.MAX_IMAGE_PIXELS), EXIF bytes cut short, a PNG
whose eXIf chunk follows the image data (chunk bytes written by hand, PNG specification 3rd
edition 5.3 and 11.3.6: length, type, data, CRC-32 from zlib), and a file name that is not
valid UTF-8 (bytes paths, PEP 383). The reference for orientation is numpy's rot90.
"""

from __future__ import annotations

import io
import os
import struct
import warnings
import zlib
from pathlib import Path

import numpy as np
import pytest
from PIL import Image

from modescope.core.sources.decode import iter_blocks, load_image, load_preview
from modescope.core.sources.scan import Problem, scan_sources

needs_posix = pytest.mark.skipif(os.name != "posix", reason="FIFOs and bytes names are POSIX")


def gray(path: Path, rows: int = 4, cols: int = 6, value: int = 0) -> Path:
    Image.fromarray(np.full((rows, cols), value, np.uint8)).save(path)
    return path


@pytest.fixture
def no_raw_warnings(capfd):
    """Fail when a warning escapes to Python's warning machinery or anything is printed."""
    with warnings.catch_warnings(record=True) as escaped:
        warnings.simplefilter("always")
        yield
    assert [str(w.message) for w in escaped] == []
    out, err = capfd.readouterr()
    assert (out, err) == ("", "")


# -- entries of a folder that are not regular files -------------------------------------------

@needs_posix
@pytest.mark.parametrize("recursive", [False, True])
def test_links_and_pipes_in_a_folder_are_named(tmp_path, recursive, no_raw_warnings):
    folder = tmp_path / "frames"
    folder.mkdir()
    gray(folder / "a.png")
    gray(folder / "b.png", value=9)
    os.symlink(folder / "nowhere.png", folder / "gone.png")      # dangling
    os.symlink(folder / "loop.png", folder / "loop.png")         # loops on itself
    os.mkfifo(folder / "pipe.png")
    os.symlink(folder / "a.png", folder / "alias.png")           # a good link: same file once
    (folder / "notes.txt").write_text("not an image")            # other types stay silent
    os.mkfifo(folder / "other_pipe")                             # no image suffix: silent
    sset = scan_sources(folder, recursive=recursive)
    assert [os.path.basename(r.path) for r in sset.images] == ["a.png", "b.png"]
    assert sorted(sset.problems, key=lambda p: p.path) == sorted([
        Problem(str(folder / "gone.png"),
                f"symbolic link to a missing file {str(folder / 'nowhere.png')!r} (skipped)"),
        Problem(str(folder / "loop.png"), "symbolic link that loops back on itself (skipped)"),
        Problem(str(folder / "pipe.png"), "is a named pipe (FIFO), not a regular file (skipped)"),
    ], key=lambda p: p.path)
    assert sset.notes == ()


@needs_posix
def test_links_and_pipes_given_by_name(tmp_path):
    gray(tmp_path / "a.png")
    os.symlink(tmp_path / "nowhere.png", tmp_path / "gone.png")
    os.symlink(tmp_path / "loop.png", tmp_path / "loop.png")
    os.mkfifo(tmp_path / "pipe.png")
    sset = scan_sources([tmp_path / "a.png", tmp_path / "gone.png", tmp_path / "loop.png",
                         tmp_path / "pipe.png", tmp_path / "absent.png"])
    assert [r.path for r in sset.images] == [str(tmp_path / "a.png")]
    assert [p.reason for p in sset.problems] == [
        f"symbolic link to a missing file {str(tmp_path / 'nowhere.png')!r} (skipped)",
        "symbolic link that loops back on itself (skipped)",
        "is a named pipe (FIFO), not a regular file (skipped)",
        "does not exist"]


# -- Pillow's warnings become notes -----------------------------------------------------------

def test_decompression_bomb_warning_is_a_note_and_error_a_problem(tmp_path, monkeypatch,
                                                                   no_raw_warnings):
    # Pillow warns above MAX_IMAGE_PIXELS and refuses above twice that
    monkeypatch.setattr(Image, "MAX_IMAGE_PIXELS", 1000)
    small = gray(tmp_path / "a_small.png", 20, 30)               # 600 pixels: fine
    large = gray(tmp_path / "b_large.png", 40, 30, value=200)    # 1200: warned, used
    huge = gray(tmp_path / "c_huge.png", 50, 50)                 # 2500: refused
    sset = scan_sources(tmp_path, resize_mismatched=True)
    assert [r.path for r in sset.images] == [str(small), str(large)]
    assert sset.notes == (Problem(str(large), "very large image (1,200 pixels, above Pillow's "
                                              "1,000-pixel limit for possible decompression "
                                              "bombs); used anyway"),)
    assert sset.problems == (Problem(str(huge), "not an image Modescope can read (image too "
                                                "large to decode safely: 2,500 pixels; Pillow "
                                                "refuses more than 2,000 pixels as a possible "
                                                "decompression bomb)"),)
    # the decoder reads it without a raw warning either
    blocks = list(iter_blocks(sset, block_size=2))
    assert blocks[0].problems == ()
    np.testing.assert_allclose(blocks[0].data[:, 1], 200 / 255, rtol=1e-6)
    assert load_preview(large, max_side=8).shape == (8, 6, 1)


def _exif_cut_short(orientation: int) -> bytes:
    exif = Image.Exif()
    exif[0x010E] = "d" * 200                 # ImageDescription: its data lies past the cut
    exif[0x0112] = orientation
    return exif.tobytes()[:-150]


def test_damaged_exif_is_a_note_and_orientation_still_read(tmp_path, no_raw_warnings):
    path = tmp_path / "cut.jpg"
    stored = np.zeros((8, 16), np.uint8)
    stored[:, :8] = 255                                         # left half white as stored
    Image.fromarray(stored).save(path, quality=100, exif=_exif_cut_short(6))
    sset = scan_sources(path)
    assert sset.images[0].size == (16, 8)                       # orientation 6 swaps
    assert sset.notes == (Problem(str(path), "damaged EXIF metadata, the damaged part was "
                                             "ignored (Pillow: Tag data larger than file. "
                                             "Skipping tag 270)"),)
    image = load_image(sset.images[0], sset)[:, :, 0]
    # orientation 6 = turned a quarter clockwise to show (numpy rot90 with k=-1)
    np.testing.assert_allclose(image, np.rot90(stored / 255.0, k=-1), atol=3 / 255)


def test_unreadable_exif_is_a_note(tmp_path, no_raw_warnings):
    path = tmp_path / "garbage.jpg"
    Image.fromarray(np.zeros((4, 6), np.uint8)).save(path, exif=b"Exif\x00\x00MM\x00*garbage")
    sset = scan_sources(path)
    assert sset.images[0].size == (4, 6)
    assert len(sset.notes) == 1 and sset.notes[0].path == str(path)
    assert sset.notes[0].reason.startswith("damaged EXIF metadata")
    assert load_image(sset.images[0], sset).shape == (4, 6, 1)


# -- a PNG whose eXIf chunk follows the image data --------------------------------------------

def _chunk(kind: bytes, data: bytes) -> bytes:
    return (struct.pack(">I", len(data)) + kind + data
            + struct.pack(">I", zlib.crc32(kind + data) & 0xFFFFFFFF))


def _png_with_trailing_exif(path: Path, stored: np.ndarray, orientation: int) -> None:
    buf = io.BytesIO()
    Image.fromarray(stored).save(buf, "PNG")
    data = buf.getvalue()
    assert data[-12:] == _chunk(b"IEND", b"")
    exif = Image.Exif()
    exif[0x0112] = orientation
    payload = exif.tobytes()[len(b"Exif\x00\x00"):]              # the chunk holds bare TIFF
    path.write_bytes(data[:-12] + _chunk(b"eXIf", payload) + data[-12:])


@pytest.mark.parametrize("orientation, turn", [(6, -1), (8, 1), (3, 2)])
def test_png_exif_after_image_data_read_alike_by_scan_and_decoder(tmp_path, orientation, turn,
                                                                  no_raw_warnings):
    stored = np.arange(24, dtype=np.uint8).reshape(4, 6) * 10
    path = tmp_path / "late.png"
    _png_with_trailing_exif(path, stored, orientation)
    with Image.open(path) as img:                                 # the chunk is after IDAT
        assert "exif" not in img.info
    expected = np.rot90(stored, k=turn) / np.float32(255)
    sset = scan_sources(path)
    assert sset.images[0].size == expected.shape
    blocks = list(iter_blocks(sset))
    assert blocks[0].problems == ()
    np.testing.assert_array_equal(blocks[0].data[:, 0], expected.astype(np.float32).ravel())
    preview = load_preview(path, max_side=8)
    assert preview.shape == expected.shape + (1,)
    np.testing.assert_allclose(preview[:, :, 0], expected, atol=1e-6)


# -- a file name that is not valid UTF-8 ------------------------------------------------------

@needs_posix
def test_name_not_valid_utf8_is_scanned_and_decoded(tmp_path, no_raw_warnings):
    folder = os.fsencode(tmp_path)
    name = os.path.join(folder, b"caf\xe9.png")                   # Latin-1, not UTF-8
    Image.fromarray(np.full((4, 6), 51, np.uint8)).save(name.decode("utf-8", "surrogateescape"))
    assert os.listdir(folder) == [b"caf\xe9.png"]
    sset = scan_sources(tmp_path)
    assert [os.fsencode(r.path) for r in sset.images] == [name]
    block = next(iter_blocks(sset))
    assert block.problems == ()
    np.testing.assert_allclose(block.data[:, 0], 0.2, rtol=1e-6)
