"""No command ever replaces a source image or the model it reads, whatever flags are given; an
existing output needs --overwrite. Every test hashes the source files before and after."""

from __future__ import annotations

import hashlib
import os
from pathlib import Path

import numpy as np
import pytest
from PIL import Image

from modescope.app.cli.main import main
from modescope.core.output.model_file import load_model


def _hashes(*folders) -> dict:
    out = {}
    for folder in folders:
        for path in sorted(Path(folder).rglob("*")):
            if path.is_file() and not path.is_symlink():
                out[str(path)] = hashlib.sha256(path.read_bytes()).hexdigest()
    return out


@pytest.fixture()
def frames(tmp_path):
    """A folder of 12 small gray PNGs, one of them named mean.png and one x.npz (a PNG)."""
    rng = np.random.default_rng(3)
    folder = tmp_path / "frames"
    folder.mkdir()
    names = [f"f{i}.png" for i in range(10)] + ["mean.png"]
    for name in names:
        Image.fromarray(rng.integers(0, 255, (8, 9), dtype=np.uint8)).save(folder / name)
    with open(folder / "x.npz", "wb") as fh:          # an image whose name ends in .npz
        Image.fromarray(rng.integers(0, 255, (8, 9), dtype=np.uint8)).save(fh, format="PNG")
    return folder


@pytest.fixture()
def model(frames, tmp_path):
    out = tmp_path / "out" / "m.npz"
    out.parent.mkdir()
    assert main(["analyze", str(frames), str(frames / "x.npz"), "-o", str(out), "--rank", "3",
                 "--quiet"]) == 0
    assert str(frames / "x.npz") in [os.path.abspath(p) for p in load_model(out).paths]
    return out


def _run(argv, capsys, *folders):
    before = _hashes(*folders)
    code = main(argv)
    err = capsys.readouterr().err
    assert _hashes(*folders) == before            # every source byte-identical
    assert "Traceback" not in err
    return code, err


@pytest.mark.parametrize("extra", [[], ["--overwrite"]])
def test_analyze_never_writes_its_model_over_a_source(frames, capsys, extra):
    target = frames / "x.npz"
    code, err = _run(["analyze", str(frames), str(target), "-o", str(target), "--quiet",
                      *extra], capsys, frames)
    assert code == 1
    assert f"refusing to write {target}: it is a source image" in err and "(named by -o)" in err


def test_analyze_refuses_a_link_to_a_source(frames, tmp_path, capsys):
    alias = tmp_path / "alias.npz"
    alias.symlink_to(frames / "x.npz")
    code, err = _run(["analyze", str(frames / "x.npz"), "-o", str(alias), "--overwrite",
                      "--quiet"], capsys, frames)
    assert code == 1 and f"the same file as {frames / 'x.npz'}" in err
    assert alias.is_symlink() and os.readlink(alias) == str(frames / "x.npz")


def test_analyze_refuses_an_existing_model_without_overwrite(frames, model, capsys):
    before = model.read_bytes()
    code, err = _run(["analyze", str(frames), "-o", str(model), "--quiet"], capsys, frames)
    assert code == 1 and model.read_bytes() == before
    assert f"-o {model}: the file already exists; pass --overwrite" in err
    # "-o m" writes m.npz: the same check applies to the name actually written
    code, err = _run(["analyze", str(frames), "-o", str(model.with_suffix("")), "--quiet"],
                     capsys, frames)
    assert code == 1 and "already exists" in err
    code, _ = _run(["analyze", str(frames), "-o", str(model), "--quiet", "--overwrite",
                    "--rank", "2"], capsys, frames)
    assert code == 0 and load_model(model).rank == 2


def test_update_onto_its_own_model_needs_overwrite(frames, model, tmp_path, capsys):
    more = tmp_path / "more"
    more.mkdir()
    rng = np.random.default_rng(9)
    for i in range(3):
        Image.fromarray(rng.integers(0, 255, (8, 9), dtype=np.uint8)).save(more / f"g{i}.png")
    before = model.read_bytes()
    code, err = _run(["update", str(model), str(more), "-o", str(model), "--quiet"], capsys,
                     frames, more)
    assert code == 1 and model.read_bytes() == before
    assert f"-o {model} is the model being updated" in err and "pass --overwrite" in err
    # a source image is refused whatever the flags
    code, err = _run(["update", str(model), str(more), "-o", str(frames / "x.npz"),
                      "--overwrite", "--quiet"], capsys, frames, more)
    assert code == 1 and f"refusing to write {frames / 'x.npz'}" in err
    code, err = _run(["update", str(model), str(more), "-o", str(model), "--overwrite",
                      "--quiet"], capsys, frames, more)
    assert code == 0 and load_model(model).n_images == 15


@pytest.mark.parametrize("target", ["f0.png", "x.npz"])
def test_outliers_csv_never_replaces_a_source(frames, model, capsys, target):
    code, err = _run(["outliers", str(model), "--csv", str(frames / target), "--overwrite"],
                     capsys, frames)
    assert code == 1
    assert f"refusing to write {frames / target}: it is a source image" in err
    assert "(named by --csv)" in err


def test_outliers_csv_never_replaces_the_model(frames, model, capsys):
    before = model.read_bytes()
    code, err = _run(["outliers", str(model), "--csv", str(model), "--overwrite"], capsys,
                     frames)
    assert code == 1 and model.read_bytes() == before
    assert "the model file this command reads" in err


def test_export_into_the_source_folder_never_replaces_a_source(frames, model, capsys):
    # mean.png is both a source image and a file the export writes
    names = sorted(os.listdir(frames))
    code, err = _run(["export", str(model), "--rank", "2", "--out", str(frames), "--what",
                      "basis", "--allow-source-folder", "--overwrite", "--quiet"],
                     capsys, frames)
    assert code == 1
    assert f"refusing to write {frames / 'mean.png'}: it is a source image" in err
    assert sorted(os.listdir(frames)) == names                    # nothing written
    # without --allow-source-folder the message names the option, not a Python parameter
    code, err = _run(["export", str(model), "--rank", "2", "--out", str(frames), "--what",
                      "spectrum", "--quiet"], capsys, frames)
    assert code == 1 and "(--allow-source-folder)" in err and "=True" not in err


def test_export_never_replaces_the_model_it_reads(frames, tmp_path, capsys):
    out = tmp_path / "exp"
    out.mkdir()
    model = out / "model_r2.npz"
    assert main(["analyze", str(frames), "-o", str(model), "--rank", "2", "--quiet"]) == 0
    before = model.read_bytes()
    code, err = _run(["export", str(model), "--rank", "2", "--out", str(out), "--what",
                      "model", "--overwrite", "--quiet"], capsys, frames)
    assert code == 1 and model.read_bytes() == before
    assert f"refusing to write {model}: it is the model file this command reads" in err


def test_reading_commands_leave_sources_alone(frames, model, capsys):
    for argv in (["info", str(model)], ["duplicates", str(model)],
                 ["outliers", str(model), "--top", "0"]):
        code, _ = _run(argv, capsys, frames)
        assert code == 0


def test_a_source_found_only_by_the_scan_is_refused_before_the_model_is_written(frames,
                                                                                 tmp_path,
                                                                                 capsys):
    alias = tmp_path / "alias.npz"          # -o names a link to a source inside the folder
    alias.symlink_to(frames / "f3.png")
    code, err = _run(["analyze", str(frames), "-o", str(alias), "--overwrite", "--quiet"],
                     capsys, frames)
    assert code == 1
    assert f"refusing to write {alias}: it is a source image of this analysis (the same file " \
           f"as {frames / 'f3.png'})" in err
    assert "the model was not written" in err
