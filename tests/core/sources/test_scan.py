"""Tests of modescope.core.sources.scan: finding, ordering and checking image files."""

from __future__ import annotations

import os
import random
from pathlib import Path

import numpy as np
import pytest
import tifffile
from PIL import Image

from modescope.core.errors import AnalysisCancelled, NoUsableImagesError, SourceError
from modescope.core.sources.scan import (SUPPORTED_SUFFIXES, ImageRef, Problem, SourceSet,
                                    natural_key, scan_sources)


def gray(path: Path, rows: int = 6, cols: int = 8, value: int = 0) -> Path:
    """Write an 8-bit gray PNG (or any format by suffix) of constant value."""
    path.parent.mkdir(parents=True, exist_ok=True)
    Image.fromarray(np.full((rows, cols), value, np.uint8)).save(path)
    return path


def names(sset: SourceSet) -> list[str]:
    return [os.path.basename(ref.path) for ref in sset.images]


# -- natural order -------------------------------------------------------------------------

def test_natural_key_orders_numbers_by_value_and_ignores_case():
    given = ["frame_10.png", "frame_2.png", "Frame_1.png", "frame_1b.png", "frame_02a.png"]
    # Expected by hand: numbers compare by value (2 < 10), letters without case.
    assert sorted(given, key=natural_key) == [
        "Frame_1.png", "frame_1b.png", "frame_2.png", "frame_02a.png", "frame_10.png"]
    assert natural_key("B") > natural_key("a")
    with pytest.raises(TypeError, match="name must be a str"):
        natural_key(3)


def test_folder_natural_order(tmp_path):
    for i in (10, 2, 1, 33, 3):
        gray(tmp_path / f"frame_{i}.png")
    sset = scan_sources(tmp_path)
    assert names(sset) == ["frame_1.png", "frame_2.png", "frame_3.png", "frame_10.png",
                           "frame_33.png"]
    assert all(os.path.isabs(ref.path) for ref in sset.images)
    assert sset.problems == ()


def test_source_order_kept_between_folders(tmp_path):
    a, b = tmp_path / "b_second", tmp_path / "a_first"
    for i in (10, 2):
        gray(a / f"x_{i}.png")
        gray(b / f"y_{i}.png")
    sset = scan_sources([a, str(b)])
    # The folder named first comes first even though its name sorts later.
    assert names(sset) == ["x_2.png", "x_10.png", "y_2.png", "y_10.png"]


def test_recursive_on_and_off(tmp_path):
    gray(tmp_path / "img_10.png")
    gray(tmp_path / "img_9.png")
    gray(tmp_path / "run_2" / "img_1.png")
    gray(tmp_path / "run_10" / "img_1.png")
    gray(tmp_path / "run_2" / "deeper" / "img_5.png")
    flat = scan_sources(tmp_path, recursive=False)
    assert names(flat) == ["img_9.png", "img_10.png"]
    deep = scan_sources(tmp_path, recursive=True)
    rel = [os.path.relpath(ref.path, tmp_path).replace(os.sep, "/") for ref in deep.images]
    # Natural order over the whole relative path, component by component.
    assert rel == ["img_9.png", "img_10.png", "run_2/deeper/img_5.png", "run_2/img_1.png",
                   "run_10/img_1.png"]


def test_hidden_files_and_folders_skipped(tmp_path):
    gray(tmp_path / "a.png")
    gray(tmp_path / ".hidden.png")
    gray(tmp_path / ".cache" / "b.png")
    gray(tmp_path / "sub" / ".c.png")
    gray(tmp_path / "sub" / "d.png")
    sset = scan_sources(tmp_path, recursive=True)
    assert names(sset) == ["a.png", "d.png"]
    assert sset.problems == ()


def test_other_file_types_in_folders_ignored(tmp_path):
    gray(tmp_path / "a.png")
    (tmp_path / "README.md").write_text("notes")
    (tmp_path / "data.csv").write_text("1,2")
    gray(tmp_path / "b.gif")  # a real image, but not a supported suffix inside a folder
    sset = scan_sources(tmp_path)
    assert names(sset) == ["a.png"]
    assert sset.problems == ()


def test_suffix_case_insensitive_and_all_supported_suffixes(tmp_path):
    gray(tmp_path / "a.PNG")
    gray(tmp_path / "b.Tif")
    gray(tmp_path / "c.JPEG")
    gray(tmp_path / "d.bmp")
    gray(tmp_path / "e.webp")
    sset = scan_sources(tmp_path)
    assert names(sset) == ["a.PNG", "b.Tif", "c.JPEG", "d.bmp", "e.webp"]
    assert {".png", ".tif", ".jpeg", ".bmp", ".webp"} <= set(SUPPORTED_SUFFIXES)


def test_explicit_file_taken_whatever_its_suffix(tmp_path):
    path = tmp_path / "frame.dat"
    Image.fromarray(np.zeros((6, 8), np.uint8)).save(path, format="PNG")
    sset = scan_sources([path])
    assert names(sset) == ["frame.dat"]
    assert sset.images[0].mode == "L"


def test_single_path_accepted(tmp_path):
    gray(tmp_path / "a.png")
    assert names(scan_sources(str(tmp_path))) == ["a.png"]
    assert names(scan_sources(tmp_path / "a.png")) == ["a.png"]


def test_duplicates_kept_once(tmp_path):
    gray(tmp_path / "a.png")
    gray(tmp_path / "b.png")
    sset = scan_sources([tmp_path / "b.png", tmp_path, str(tmp_path / "a.png")])
    assert names(sset) == ["b.png", "a.png"]


def test_nonexistent_path_is_a_problem(tmp_path):
    gray(tmp_path / "a.png")
    missing = tmp_path / "nope"
    sset = scan_sources([tmp_path, missing])
    assert names(sset) == ["a.png"]
    assert sset.problems == (Problem(str(missing), "does not exist"),)
    assert str(sset.problems[0]) == f"{missing}: does not exist"


def test_unreadable_file_is_a_problem_naming_it(tmp_path):
    gray(tmp_path / "good.png")
    bad = tmp_path / "bad.png"
    bad.write_bytes(random.Random(0).randbytes(200))
    sset = scan_sources(tmp_path)
    assert names(sset) == ["good.png"]
    assert len(sset.problems) == 1
    text = str(sset.problems[0])
    assert str(bad) in text
    assert "not an image Modescope can read" in text


def test_unsupported_mode_is_a_problem(tmp_path):
    gray(tmp_path / "a.tif")
    Image.new("LAB", (8, 6)).save(tmp_path / "b.tif")
    sset = scan_sources(tmp_path)
    assert names(sset) == ["a.tif"]
    assert "mode 'LAB' is not supported" in sset.problems[0].reason


def test_problem_str_with_page():
    assert str(Problem("/x/a.tif", "bad", page=2)) == "/x/a.tif (page 2): bad"
    assert str(Problem("/x/a.png", "bad")) == "/x/a.png: bad"


# -- size policy ---------------------------------------------------------------------------

def test_most_common_size_is_reference_and_others_skipped(tmp_path):
    for i in range(3):
        gray(tmp_path / f"f{i}.png", rows=96, cols=128)
    gray(tmp_path / "f3.png", rows=64, cols=80)
    sset = scan_sources(tmp_path)
    assert sset.reference_size == (96, 128)
    assert names(sset) == ["f0.png", "f1.png", "f2.png"]
    assert sset.problems[0].path == str(tmp_path / "f3.png")
    assert sset.problems[0].reason == (
        "size 64x80 differs from the reference 96x128 (skipped; use --resize-mismatched to "
        "include it)")
    assert sset.image_shape == (96, 128, 1)
    assert sset.n_images == 3


def test_size_tie_goes_to_first_in_sort_order(tmp_path):
    gray(tmp_path / "a_2.png", rows=5, cols=7)
    gray(tmp_path / "a_10.png", rows=6, cols=8)
    sset = scan_sources(tmp_path)
    assert sset.reference_size == (5, 7)
    assert names(sset) == ["a_2.png"]


def test_resize_mismatched_keeps_them(tmp_path):
    gray(tmp_path / "f0.png", rows=6, cols=8)
    gray(tmp_path / "f1.png", rows=6, cols=8)
    gray(tmp_path / "f2.png", rows=3, cols=5)
    sset = scan_sources(tmp_path, resize_mismatched=True)
    assert sset.reference_size == (6, 8)
    assert names(sset) == ["f0.png", "f1.png", "f2.png"]
    assert [ref.size for ref in sset.images] == [(6, 8), (6, 8), (3, 5)]
    assert sset.resize_mismatched is True
    assert sset.problems == ()


# -- colour, modes, pages, orientation -----------------------------------------------------

def test_color_and_channels(tmp_path):
    gray(tmp_path / "a.png")
    assert scan_sources(tmp_path, color="rgb").channels == 3
    assert scan_sources(tmp_path, color="rgb").image_shape == (6, 8, 3)
    assert scan_sources(tmp_path).channels == 1
    with pytest.raises(ValueError, match="color must be one of gray, rgb; got 'grey'"):
        scan_sources(tmp_path, color="grey")
    with pytest.raises(TypeError, match="color"):
        scan_sources(tmp_path, color=3)


@pytest.mark.parametrize("arr, mode", [
    (np.zeros((6, 8), np.uint8), "L"),
    (np.zeros((6, 8, 3), np.uint8), "RGB"),
    (np.zeros((6, 8, 4), np.uint8), "RGBA"),
    (np.zeros((6, 8), np.uint16), "I;16"),
])
def test_mode_recorded(tmp_path, arr, mode):
    Image.fromarray(arr).save(tmp_path / "a.png")
    assert scan_sources(tmp_path).images[0].mode == mode


def test_float_and_int_tiff_modes(tmp_path):
    tifffile.imwrite(tmp_path / "a.tif", np.zeros((6, 8), np.float32))
    tifffile.imwrite(tmp_path / "b.tif", np.zeros((6, 8), np.int32))
    assert [ref.mode for ref in scan_sources(tmp_path).images] == ["F", "I"]


def test_multipage_tiff_one_ref_per_page(tmp_path):
    stack = np.arange(3 * 6 * 8, dtype=np.uint8).reshape(3, 6, 8)
    tifffile.imwrite(tmp_path / "stack.tif", stack, photometric="minisblack")
    gray(tmp_path / "single.png")
    sset = scan_sources(tmp_path)
    assert [(os.path.basename(r.path), r.page) for r in sset.images] == [
        ("single.png", 0), ("stack.tif", 0), ("stack.tif", 1), ("stack.tif", 2)]
    assert all(r.size == (6, 8) for r in sset.images)


@pytest.mark.parametrize("orientation, swapped", [(1, False), (3, False), (6, True),
                                                  (8, True)])
@pytest.mark.parametrize("suffix", [".png", ".jpg"])
def test_exif_orientation_swaps_size(tmp_path, orientation, swapped, suffix):
    exif = Image.Exif()
    exif[0x0112] = orientation
    Image.fromarray(np.zeros((6, 8), np.uint8)).save(tmp_path / f"a{suffix}", exif=exif)
    ref = scan_sources(tmp_path).images[0]
    # EXIF 2.3 (CIPA DC-008): orientations 5-8 show the stored rows as columns.
    assert ref.size == ((8, 6) if swapped else (6, 8))


def test_scan_reads_headers_only(tmp_path, monkeypatch):
    for i in range(3):
        gray(tmp_path / f"f{i}.png")

    from PIL import ImageFile
    loads = []
    original = ImageFile.ImageFile.load

    def counting_load(self):
        loads.append(self.filename)
        return original(self)

    monkeypatch.setattr(ImageFile.ImageFile, "load", counting_load)
    assert scan_sources(tmp_path).n_images == 3
    assert loads == []  # no pixel data decoded during the scan


# -- no usable images, empty sources, arguments --------------------------------------------

def test_no_usable_images_error_message(tmp_path):
    for i in range(7):
        (tmp_path / f"bad_{i}.png").write_bytes(b"not an image at all")
    with pytest.raises(NoUsableImagesError) as info:
        scan_sources(tmp_path)
    message = str(info.value)
    assert "7 files looked at" in message
    assert str(tmp_path / "bad_0.png") in message
    assert "and 2 more" in message  # the first five problems are listed
    assert isinstance(info.value, SourceError) and isinstance(info.value, ValueError)


def test_empty_folder_error_message(tmp_path):
    (tmp_path / "notes.txt").write_text("x")
    with pytest.raises(NoUsableImagesError, match="0 files looked at"):
        scan_sources(tmp_path)


def test_only_missing_paths(tmp_path):
    with pytest.raises(NoUsableImagesError, match="does not exist"):
        scan_sources([tmp_path / "missing"])


def test_empty_sources_value_error():
    with pytest.raises(ValueError, match="sources must name at least one folder or file"):
        scan_sources([])


@pytest.mark.parametrize("bad", [3, [3], b"abc", None])
def test_sources_type_error(bad):
    with pytest.raises(TypeError, match="sources"):
        scan_sources(bad)


def test_flag_type_errors(tmp_path):
    gray(tmp_path / "a.png")
    with pytest.raises(TypeError, match="recursive"):
        scan_sources(tmp_path, recursive="yes")
    with pytest.raises(TypeError, match="resize_mismatched"):
        scan_sources(tmp_path, resize_mismatched=1)
    with pytest.raises(TypeError, match="progress"):
        scan_sources(tmp_path, progress=5)


def test_progress_and_cancel(tmp_path):
    for i in range(4):
        gray(tmp_path / f"f{i}.png")
    calls = []
    scan_sources(tmp_path, progress=lambda done, total: calls.append((done, total)))
    assert calls == [(1, 4), (2, 4), (3, 4), (4, 4)]

    asked = []

    def cancel():
        asked.append(1)
        return len(asked) > 2

    with pytest.raises(AnalysisCancelled):
        scan_sources(tmp_path, cancel=cancel)


def test_imageref_defaults():
    ref = ImageRef("/a.png")
    assert (ref.page, ref.size, ref.mode) == (0, (0, 0), "")


def test_links_and_linked_folders_are_found_once(tmp_path):
    real = tmp_path / "real"
    real.mkdir()
    gray(real / "a.png")
    gray(real / "b.png")
    (real / "c.png").symlink_to(real / "a.png")         # a link to a file of the same folder
    (tmp_path / "via").symlink_to(real, target_is_directory=True)
    # the same files through the real folder, a linked folder, and one file named on its own
    sset = scan_sources([real, tmp_path / "via", tmp_path / "via" / "b.png"])
    assert names(sset) == ["a.png", "b.png"]
    # through the linked folder first: its paths are kept as given
    sset = scan_sources([tmp_path / "via", real])
    assert [r.path for r in sset.images] == [str(tmp_path / "via" / "a.png"),
                                            str(tmp_path / "via" / "b.png")]
    # recursive listing of a folder holding a link to a sibling folder
    (tmp_path / "tree").mkdir()
    (tmp_path / "tree" / "inner").symlink_to(real, target_is_directory=True)
    gray(tmp_path / "tree" / "d.png")
    sset = scan_sources([tmp_path / "tree", real], recursive=True)
    assert sorted(names(sset)) == ["a.png", "b.png", "d.png"]
