"""Tests of modescope.core.output.export (options, plan and run: compact model, overwrite,
source folder, read-only and full destinations, cancel, progress) and of modescope.app.cli.export.

Outside references: imageio as decoder of the written files, scikit-image's
``peak_signal_noise_ratio``, and numpy for the float16 rounding bound.
"""

import dataclasses
import errno
import os
from pathlib import Path

import imageio.v3 as iio
import numpy as np
import pytest
from PIL import Image
from skimage.metrics import peak_signal_noise_ratio

from export_testdata import (array_loader, is_root_like, listing, no_temp_files, read_csv)
from modescope.core.output import atomic
from modescope.core.output.atomic import DestinationError
from modescope.core.output.export import (WHAT_CHOICES, ExportOptions, export, plan_export,
                                          run_export)
from modescope.core.output.images import preview_image


def test_compact_model_reopens_with_same_previews(tmp_path, gray):
    from modescope.core.output.model_file import load_model
    X, d = gray
    src = tmp_path / "src"
    src.mkdir()
    paths = []
    for i in range(d.n_images - 1):                  # the last source file is missing
        p = src / f"img_{i:02d}.png"
        p.write_bytes(os.urandom(100 + i))
        paths.append(str(p))
    paths.append(str(src / "gone.png"))
    d = d.replace(paths=tuple(paths))
    out = tmp_path / "out"
    out.mkdir()
    k = 3
    rep = export(d, out, rank=k, what="model")
    model = load_model(out / f"model_r{k}.npz")
    assert model.rank == k and model.n_images == d.n_images
    for i in range(d.n_images):
        # same float32 numbers; only the summation order of BLAS may differ (a few ulp)
        np.testing.assert_allclose(preview_image(model, i, k), preview_image(d, i, k),
                                   rtol=0, atol=1e-6)
    n, m = d.n_pixels, d.n_images
    assert (rep.stored_numbers, rep.full_numbers) == (k * (n + m + 1) + n, n * m)
    assert rep.model_bytes == (out / f"model_r{k}.npz").stat().st_size
    assert rep.source_bytes == sum(os.path.getsize(p) for p in paths[:-1])
    assert rep.missing_sources == (os.path.abspath(paths[-1]),)
    assert rep.byte_ratio == pytest.approx(rep.source_bytes / rep.model_bytes)
    assert "k(n+m+1)+n" in rep.summary()


def test_compact_model_float16(tmp_path, gray):
    from modescope.core.output.model_file import load_model
    X, d = gray
    k = 4
    rep = export(d, tmp_path, rank=k, what="model", float16=True)
    path = tmp_path / f"model_r{k}_f16.npz"
    with np.load(path, allow_pickle=False) as npz:
        assert npz["basis"].dtype == np.float16 and npz["weights"].dtype == np.float16
    model = load_model(path)
    # stated tolerance: float16 rounding (unit roundoff u = 2**-11) of mean, basis, weights,
    # |error| <= u|mean| + sum_j (2u + u^2)|b_j||w_j| + 2**-24 (subnormal step) + float32 slack
    u = 2.0 ** -11
    for i in range(d.n_images):
        a = preview_image(model, i, k, clip=False).ravel().astype(np.float64)
        b = preview_image(d, i, k, clip=False).ravel().astype(np.float64)
        bound = (u * np.abs(d.mean) + (2 * u + u * u) * (np.abs(d.basis[:, :k])
                 @ np.abs(d.weights[:k, i])) + 2.0 ** -24 * (k + 1) + 1e-6)
        assert np.all(np.abs(a - b) <= bound)
    full = export(d, tmp_path, rank=k, what="model")
    assert rep.model_bytes < full.model_bytes


def test_overwrite_refused_up_front(tmp_path, gray):
    X, d = gray
    (tmp_path / "spectrum.csv").write_text("mine")
    with pytest.raises(DestinationError, match="already exist"):
        export(d, tmp_path, rank=2, what="previews,spectrum,weights")
    assert listing(tmp_path) == ["spectrum.csv"]
    assert (tmp_path / "spectrum.csv").read_text() == "mine"
    rep = export(d, tmp_path, rank=2, what="previews,spectrum,weights", overwrite=True)
    assert rep.n_written == d.n_images + 2
    assert (tmp_path / "spectrum.csv").read_text().startswith("index,")


def test_writing_into_a_source_folder_needs_the_flag(tmp_path, gray):
    X, d = gray
    src = tmp_path / "src"
    src.mkdir()
    paths = []
    for i in range(d.n_images):
        p = src / f"s{i:02d}.png"
        Image.fromarray(np.rint(X[:, i].reshape(12, 16) * 255).astype(np.uint8)).save(p)
        paths.append(str(p))
    d = d.replace(paths=tuple(paths))
    before = {p: Path(p).read_bytes() for p in paths}
    with pytest.raises(DestinationError, match="source images"):
        export(d, src, rank=2, what="previews")
    assert len(listing(src)) == d.n_images
    rep = export(d, src, rank=2, what="previews", allow_source_folder=True)
    assert rep.n_written == d.n_images
    assert all(Path(p).read_bytes() == b for p, b in before.items())   # sources untouched


def test_read_only_destination(tmp_path, gray, monkeypatch):
    X, d = gray
    dest = tmp_path / "ro"
    dest.mkdir()
    dest.chmod(0o555)
    try:
        if is_root_like(dest):
            # root ignores the mode bits: simulate the refusal of the operating system
            def refuse(*args, **kwargs):
                raise atomic.destination_error(
                    dest / "x", PermissionError(errno.EACCES, "Permission denied"),
                    "create a temporary file for")
            monkeypatch.setattr(atomic, "_open_temp", refuse)
        with pytest.raises(DestinationError, match="read-only|permission"):
            export(d, dest, rank=2, what="previews,spectrum")
        assert listing(dest) == []
    finally:
        dest.chmod(0o755)


def test_rename_refused_midway_leaves_complete_files_only(tmp_path, gray, monkeypatch):
    X, d = gray
    real_replace = os.replace
    calls = {"n": 0}

    def replace(src, dst):
        calls["n"] += 1
        if calls["n"] > 3:
            raise PermissionError(errno.EACCES, "Permission denied", str(dst))
        return real_replace(src, dst)

    monkeypatch.setattr(os, "replace", replace)
    with pytest.raises(DestinationError, match="permission") as info:
        export(d, tmp_path, rank=2, what="previews")
    assert no_temp_files(tmp_path)
    assert listing(tmp_path) == sorted(p.name for p in info.value.written)
    assert len(info.value.written) == 3
    for p in info.value.written:                     # complete, decodable files
        assert iio.imread(p).shape == (12, 16)


class _FullDisk:
    """A file object that writes part of the data and then fails as a full disk does."""

    def __init__(self, f):
        self.f = f

    def write(self, data):
        self.f.write(bytes(data)[:10])
        self.f.flush()
        raise OSError(errno.ENOSPC, "No space left on device")

    def __getattr__(self, name):
        return getattr(self.f, name)


def test_disk_full_leaves_no_partial_file(tmp_path, gray, monkeypatch):
    X, d = gray
    real_open = atomic._open_temp
    seen = []

    def open_temp(target, mode, encoding, newline):
        f, tmp = real_open(target, mode, encoding, newline)
        seen.append(tmp)
        if target.name.startswith("weights"):
            return _FullDisk(f), tmp
        return f, tmp

    monkeypatch.setattr(atomic, "_open_temp", open_temp)
    with pytest.raises(DestinationError, match="full") as info:
        export(d, tmp_path, rank=2, what="spectrum,weights,previews")
    assert listing(tmp_path) == ["spectrum.csv"]
    assert [p.name for p in info.value.written] == ["spectrum.csv"]
    assert not any(p.exists() for p in seen)
    assert str(tmp_path / "weights_r2.csv") in str(info.value)


@pytest.mark.parametrize("n_done", [0, 1, 5])
def test_cancel_keeps_exactly_n_files(tmp_path, gray, n_done):
    X, d = gray
    done = {"n": 0}
    seen = []

    def progress(a, b):
        done["n"] = a
        seen.append((a, b))

    rep = export(d, tmp_path, rank=2, what="spectrum,basis,previews", progress=progress,
                    cancel=lambda: done["n"] >= n_done)
    total = 1 + 3 + d.n_images
    assert rep.cancelled
    assert rep.n_written == n_done and len(listing(tmp_path)) == n_done
    assert len(rep.skipped) == total - n_done
    assert seen == [(j, total) for j in range(n_done + 1)]
    assert no_temp_files(tmp_path)


def test_cancel_during_quality_rows(tmp_path, gray):
    X, d = gray
    calls = {"n": 0}

    def cancel():
        calls["n"] += 1
        return calls["n"] > 4           # 1 check before spectrum, 1 before quality, then rows

    rep = export(d, tmp_path, rank=2, what="spectrum,quality", cancel=cancel,
                    loader=array_loader(X))
    assert rep.cancelled and [p.name for p in rep.written] == ["spectrum.csv"]
    assert listing(tmp_path) == ["spectrum.csv"]


def test_progress_complete_run(tmp_path, gray):
    X, d = gray
    seen = []
    rep = export(d, tmp_path, rank=2, what="spectrum,weights", progress=lambda a, b:
                    seen.append((a, b)))
    assert seen == [(0, 2), (1, 2), (2, 2)] and not rep.cancelled and rep.skipped == ()


@pytest.mark.parametrize("kwargs, error, match", [
    ({"rank": 0}, ValueError, "rank"),
    ({"rank": 99}, ValueError, "rank"),
    ({"rank": 2, "what": "previews,pictures"}, ValueError, "what"),
    ({"rank": 2, "image_format": "gif"}, ValueError, "image_format"),
    ({"rank": 2, "quality": 0}, ValueError, "quality"),
    ({"rank": 2, "images": [0, 99]}, ValueError, "images"),
    ({"rank": 2, "images": "some"}, ValueError, "images"),
    ({"rank": 2, "overwrite": "yes"}, TypeError, "overwrite"),
    ({"rank": 2.0}, TypeError, "rank"),
])
def test_invalid_arguments(tmp_path, gray, kwargs, error, match):
    X, d = gray
    with pytest.raises(error, match=match):
        export(d, tmp_path, **kwargs)
    assert listing(tmp_path) == []


def test_missing_destination_folder(tmp_path, gray):
    X, d = gray
    with pytest.raises(DestinationError, match="does not exist"):
        export(d, tmp_path / "nope", rank=2)


def test_quality_with_the_real_loader(tmp_path, analysed):
    d, model, src = analysed
    out = tmp_path / "out"
    out.mkdir()
    os.remove(d.paths[5])
    rep = export(d, out, rank=3, what="quality")
    rows = {r[0]: r for r in read_csv(out / "quality_r3.csv")[1:]}
    assert "missing" in rows[d.paths[5]][4]
    for i in (0, 7):
        decoded = iio.imread(d.paths[i]).astype(np.float64)[:, :, None] / 255  # imageio decode
        est = preview_image(d, i, 3).astype(np.float64)
        assert float(rows[d.paths[i]][3]) == pytest.approx(
            peak_signal_noise_ratio(decoded, est, data_range=1.0), rel=1e-6)
    assert d.paths[5] in rep.missing_sources


def run_cli(argv):
    import argparse
    from modescope.app.cli import export as cli_export
    parser = argparse.ArgumentParser(prog="modescope")
    sub = parser.add_subparsers(dest="command")
    cli_export.register(sub)
    args = parser.parse_args(["export", *argv])
    return args.func(args)


def test_cli_export(tmp_path, analysed, capsys):
    d, model, src = analysed
    out = tmp_path / "cli_out"
    code = run_cli([str(model), "--rank", "2", "--out", str(out), "--images", "1,4-5",
                    "--what", "previews,weights,spectrum,model", "--format", "tiff",
                    "--float16"])
    captured = capsys.readouterr()
    assert code == 0, captured.err
    assert "export: " in captured.err and "numbers stored" in captured.out
    names = listing(out)
    assert len([n for n in names if n.endswith(".tif")]) == 3
    assert "model_r2_f16.npz" in names and "weights_r2.csv" in names
    weights = read_csv(out / "weights_r2.csv")
    assert [r[0] for r in weights[1:]] == [d.paths[0], d.paths[3], d.paths[4]]
    # again without --overwrite: refused, nothing changed
    stamp = {n: (out / n).stat().st_mtime_ns for n in names}
    assert run_cli([str(model), "--rank", "2", "--out", str(out), "--images", "1,4-5",
                    "--what", "previews,weights,spectrum,model", "--format", "tiff"]) == 1
    assert "already exist" in capsys.readouterr().err
    assert {n: (out / n).stat().st_mtime_ns for n in listing(out)} == stamp
    # list file of paths, into the source folder only with the flag
    lst = tmp_path / "list.txt"
    lst.write_text(f"# chosen\n{d.paths[2]}\n\n{d.paths[1]}\n")
    assert run_cli([str(model), "--rank", "1", "--out", str(src), "--images", str(lst),
                    "--what", "previews"]) == 1
    assert "source images" in capsys.readouterr().err
    assert run_cli([str(model), "--rank", "1", "--out", str(src), "--images", str(lst),
                    "--what", "previews", "--allow-source-folder"]) == 0
    assert len([n for n in listing(src) if n.endswith("_r1.png")]) == 2
    # usage errors
    assert run_cli([str(model), "--rank", "2", "--out", str(out), "--images", "1,x"]) == 2
    assert run_cli([str(model), "--rank", "9", "--out", str(tmp_path / "o2")]) == 2
    assert run_cli([str(model), "--rank", "2", "--out", str(out), "--what", "nothing"]) == 2
    assert run_cli([str(tmp_path / "missing.npz"), "--rank", "2", "--out", str(out)]) == 1


def test_cli_flagged_and_parse_list(tmp_path, analysed):
    from modescope.app.cli.export import parse_image_list
    d, model, src = analysed
    assert parse_image_list("6,2-4,3", d) == [5, 1, 2, 3]     # 1-based numbers in, 0-based out
    with pytest.raises(ValueError, match="1..12"):
        parse_image_list("13", d)
    lst = tmp_path / "l.txt"
    lst.write_text("/not/a/source.png\n")
    with pytest.raises(ValueError, match="not sources"):
        parse_image_list(str(lst), d)
    out = tmp_path / "fl"
    assert run_cli([str(model), "--rank", "2", "--out", str(out), "--images", "flagged",
                    "--what", "previews,spectrum", "--quiet"]) == 0
    from modescope.core.review.outliers import score_table
    n_flagged = int(np.count_nonzero(score_table(d, 2, 0.99).flag))
    assert len(listing(out)) == n_flagged + 1


# ---------------------------------------------------------------------------------------------
# options, plan and run arguments
# ---------------------------------------------------------------------------------------------
@pytest.mark.parametrize("kwargs, error, match", [
    ({"rank": "2"}, TypeError, "rank must be an integer"),
    ({"rank": 0}, ValueError, "rank must be at least 1"),
    ({"what": ""}, ValueError, "what must name at least one"),
    ({"what": 5}, TypeError, "what must be a comma-separated string"),
    ({"what": ["previews", "movies"]}, ValueError, "what must be one of"),
    ({"image_format": "gif"}, ValueError, "image_format must be one of"),
    ({"quality": 101}, ValueError, "quality must be at most 100"),
    ({"images": "some"}, ValueError, "images must be one of all, flagged"),
    ({"images": [[0, 1]]}, TypeError, "images must be 'all', 'flagged'"),
    ({"images": [0.5]}, TypeError, "images must be 'all', 'flagged'"),
    ({"level": 1.0}, ValueError, "level must be < 1.0"),
    ({"upsample": 1}, TypeError, "upsample must be True or False"),
    ({"float16": "no"}, TypeError, "float16 must be True or False"),
    ({"sheet_count": 0}, ValueError, "sheet_count must be at least 1"),
    ({"overwrite": None}, TypeError, "overwrite must be True or False"),
    ({"allow_source_folder": "yes"}, TypeError, "allow_source_folder must be True or False"),
    ({"loader": 3}, TypeError, "loader must be a callable"),
])
def test_options_are_checked_when_made(kwargs, error, match):
    with pytest.raises(error, match=match):
        ExportOptions(**{"rank": 2, **kwargs})


def test_options_are_normalised_and_frozen():
    o = ExportOptions(rank=np.int64(3), what="quality, previews,spectrum",
                      images=np.array([4, 1, 4]), upsample=np.bool_(True))
    assert o.what == ("spectrum", "previews", "quality")          # WHAT_CHOICES order
    assert o.images == (4, 1, 4) and all(type(i) is int for i in o.images)
    assert o.rank == 3 and type(o.rank) is int and o.upsample is True
    assert ExportOptions(rank=1).what == WHAT_CHOICES
    assert ExportOptions(rank=1, images=np.array([True, False])).images == (True, False)
    assert ExportOptions(rank=1, images=[]).images == ()
    with pytest.raises(dataclasses.FrozenInstanceError):
        o.rank = 4
    with pytest.raises(ValueError, match="quality"):              # replace checks again
        dataclasses.replace(o, quality=0)
    assert o == ExportOptions(rank=3, what=("previews", "spectrum", "quality"), images=[4, 1, 4],
                              upsample=True)


def test_plan_export_needs_options_and_writes_nothing(tmp_path, gray):
    X, d = gray
    with pytest.raises(TypeError, match="options must be an ExportOptions, got dict"):
        plan_export(d, tmp_path, {"rank": 2})
    with pytest.raises(TypeError, match="folder must be a path"):
        plan_export(d, 3, ExportOptions(rank=2))
    with pytest.raises(ValueError, match=f"rank must be at most {d.rank}"):
        plan_export(d, tmp_path, ExportOptions(rank=d.rank + 1))
    plan = plan_export(d, tmp_path, ExportOptions(rank=2, what="basis,sheet,weights",
                                                  images=[5, 2], sheet_count=9))
    assert [p.name for p in plan.files] == ["weights_r2.csv", "mean.png", "basis_001.png",
                                            "basis_002.png", "basis_sheet.png"]
    assert plan.sheet_count == 2 and plan.indices.tolist() == [5, 2] and plan.rank == 2
    assert listing(tmp_path) == []
    with pytest.raises(TypeError, match="plan must be an ExportPlan"):
        run_export("plan")
    with pytest.raises(TypeError, match="progress must be a callable or None, got int"):
        run_export(plan, progress=1)
    assert listing(tmp_path) == []


def test_float16_model_refused_when_weights_overflow(tmp_path, gray):
    X, d = gray
    big = d.replace(weights=d.weights * 1e6, singular_values=d.singular_values * 1e6,
                    total_energy=d.total_energy * 1e12)
    with pytest.raises(ValueError, match="float16 cannot hold weights"):
        plan_export(big, tmp_path, ExportOptions(rank=2, what="model", float16=True))
    assert plan_export(big, tmp_path, ExportOptions(rank=2, what="model")).files == (
        tmp_path / "model_r2.npz",)
