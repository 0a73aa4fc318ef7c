"""Re-basing the source files of an analysis after the collection was moved."""

from __future__ import annotations

import os
import shutil

import numpy as np
import pytest
from PIL import Image

from modescope.core.engine.pipeline import AnalysisOptions, analyze, load_analysis_image
from modescope.core.errors import AnalysisCancelled, ModescopeError
from modescope.core.sources.relocate import Relocation, missing_sources, relocate_sources


@pytest.fixture()
def moved(tmp_path):
    """An analysis of 12 gray images in old/day1 and old/day2, then old/ renamed to new/."""
    rng = np.random.default_rng(3)
    old = tmp_path / "old"
    for day in ("day1", "day2"):
        (old / day).mkdir(parents=True)
    arrays = {}
    for i in range(12):
        a = (rng.random((10, 14)) * 255).astype(np.uint8)
        path = old / ("day1" if i < 6 else "day2") / f"frame_{i % 6}.png"  # names repeat
        Image.fromarray(a).save(path)
        arrays[str(path)] = a
    d = analyze([old], AnalysisOptions(rank=3, recursive=True)).decomposition
    new = tmp_path / "new"
    shutil.move(str(old), str(new))
    return d, old, new, arrays


def test_missing_sources_lists_every_moved_file(moved):
    d, old, _new, _ = moved
    gone = missing_sources(d)
    assert len(gone) == 12 and gone == tuple(dict.fromkeys(d.paths))
    assert all(p.startswith(str(old)) for p in gone)


def test_relative_paths_rebased_and_images_read_again(moved):
    d, old, new, arrays = moved
    found = relocate_sources(d, new)
    assert isinstance(found, Relocation)
    assert found.missing == () and found.problems == () and len(found.moved) == 12
    assert found.n_images_moved == 12
    r = found.decomposition
    # same relative place (the names repeat across day1 and day2: matched by relative path)
    assert [os.path.relpath(p, new) for p in r.paths] == [os.path.relpath(p, old)
                                                          for p in d.paths]
    assert missing_sources(r) == ()
    np.testing.assert_array_equal(r.weights, d.weights)   # nothing else changes
    # the re-pointed analysis reads its images again: the pixels are the original file's
    img = load_analysis_image(r, 7)
    np.testing.assert_allclose(img[..., 0], arrays[d.paths[7]] / 255.0, atol=1e-6)


def test_parent_folder_chosen(moved, tmp_path):
    d, old, new, _ = moved
    # the user picks the folder above the moved one: no relative path fits, the file name
    # does (twice), and the candidate sharing the folder name day1 or day2 wins
    found = relocate_sources(d, tmp_path)
    assert found.missing == () and len(found.moved) == 12
    assert [os.path.relpath(p, new) for p in found.decomposition.paths] == [
        os.path.relpath(p, old) for p in d.paths]


def test_two_old_files_never_share_a_new_one(moved, tmp_path):
    d, old, new, _ = moved
    # a flat copy of day2: day1/frame_k and day2/frame_k would both become flat/frame_k
    flat = tmp_path / "flat"
    flat.mkdir()
    for p in sorted((new / "day2").iterdir()):
        shutil.copy(p, flat / p.name)
    found = relocate_sources(d, flat)
    assert found.moved == {} and len(found.missing) == 12
    shared = [p for p in found.problems if p.path == str(flat / "frame_0.png")]
    assert shared and "would stand for 2 files of the analysis" in shared[0].reason
    assert found.decomposition.paths == d.paths


def test_found_by_name_in_another_layout(tmp_path):
    rng = np.random.default_rng(5)
    src = tmp_path / "shoot"
    (src / "a").mkdir(parents=True)
    (src / "b").mkdir()
    names = ["a/x1.png", "a/x2.png", "b/y1.png", "b/y2.png", "b/y3.png"]
    for name in names:
        Image.fromarray((rng.random((8, 9)) * 255).astype(np.uint8)).save(src / name)
    d = analyze([src], AnalysisOptions(rank=2, recursive=True)).decomposition
    dest = tmp_path / "archive"
    (dest / "2026" / "all").mkdir(parents=True)
    for name in names:                   # every file now in one folder two levels down
        shutil.move(str(src / name), str(dest / "2026" / "all" / os.path.basename(name)))
    found = relocate_sources(d, dest)
    assert found.missing == () and len(found.moved) == 5
    assert [os.path.basename(p) for p in found.decomposition.paths] == [
        os.path.basename(p) for p in d.paths]
    assert all(os.path.dirname(p) == str(dest / "2026" / "all")
               for p in found.decomposition.paths)


def test_a_file_of_another_size_is_refused(moved, tmp_path):
    d, old, _new, _ = moved
    wrong = tmp_path / "wrong" / "day1"
    wrong.mkdir(parents=True)
    Image.fromarray(np.zeros((11, 14), np.uint8)).save(wrong / "frame_1.png")
    found = relocate_sources(d, tmp_path / "wrong")
    assert str(old / "day1" / "frame_1.png") in found.missing
    reasons = [p.reason for p in found.problems if p.path == str(wrong / "frame_1.png")]
    assert reasons and "size 11x14 differs from the analysis' 10x14" in reasons[0]
    assert found.moved == {}


def test_files_in_place_are_kept(moved):
    d, old, new, _ = moved
    shutil.move(str(new), str(old))          # put the collection back
    found = relocate_sources(d, old.parent)
    assert found.moved == {} and found.missing == ()
    assert found.decomposition.paths == d.paths


def test_bad_arguments(moved, tmp_path):
    d, _old, new, _ = moved
    with pytest.raises(TypeError, match="decomposition must be a Decomposition, got str"):
        relocate_sources("d", new)
    with pytest.raises(TypeError, match="folder must be a str or path-like, got int"):
        relocate_sources(d, 3)
    with pytest.raises(ValueError, match="existing folder.*not found"):
        relocate_sources(d, tmp_path / "nowhere")
    with pytest.raises(ModescopeError, match="does not record its source files"):
        relocate_sources(d.replace(paths=()), new)
    with pytest.raises(AnalysisCancelled, match="cancelled"):
        relocate_sources(d, new, cancel=lambda: True)
    with pytest.raises(TypeError, match="decomposition must be a Decomposition"):
        missing_sources(None)
