"""``modescope check``: new images scored against a frozen model, exit codes, CSV, maps.

Outside reference: the Phase II T2 limit recomputed with scipy.stats.f (Tracy, Young and Mason
1992); everything else checks the command against core.review.check, which test_check.py checks
against outside references.
"""

from __future__ import annotations

import csv
import hashlib

import numpy as np
import pytest
from PIL import Image
from scipy import stats

from modescope.app.cli.main import main
from modescope.core.output.model_file import load_model
from modescope.core.review.check import CHECK_COLUMNS, check_images


def _frames(folder, rng, count, blob=False, start=0):
    folder.mkdir(exist_ok=True)
    r, c = np.mgrid[0:12, 0:16] / 11.0
    for i in range(count):
        v = 0.4 + 0.15 * rng.normal() * np.sin(3 * r) + 0.1 * rng.normal() * c
        v = v + 0.01 * rng.normal(size=v.shape)
        if blob:
            v = v + 0.4 * np.exp(-((r * 11 - 3) ** 2 + (c * 11 - 4) ** 2) / 2.0)
        Image.fromarray(np.clip(v * 255, 0, 255).round().astype(np.uint8)).save(
            folder / f"img_{start + i:03d}.png")


@pytest.fixture()
def setup(tmp_path, capsys):
    rng = np.random.default_rng(3)
    _frames(tmp_path / "ref", rng, 60)
    _frames(tmp_path / "good", rng, 5, start=100)
    _frames(tmp_path / "bad", rng, 2, blob=True, start=200)
    model = tmp_path / "model.npz"
    assert main(["analyze", str(tmp_path / "ref"), "-o", str(model), "--rank", "6",
                 "--quiet"]) == 0
    capsys.readouterr()
    return tmp_path, model


def _sha(path):
    return hashlib.sha256(path.read_bytes()).hexdigest()


def test_check_scores_writes_the_csv_and_never_touches_the_model(setup, capsys):
    tmp, model = setup
    before = _sha(model)
    Image.fromarray(np.zeros((3, 3), np.uint8)).save(tmp / "bad" / "tiny.png")
    out = tmp / "check.csv"
    code = main(["check", str(model), str(tmp / "good"), str(tmp / "bad"), "--rank", "2",
                 "--csv", str(out), "--quiet"])
    captured = capsys.readouterr()
    assert code == 0
    assert "checked 7 new images at rank 2 of 6, level 99 %" in captured.out
    assert "Flagged: 2 of 7 new images" in captured.out
    assert "tiny.png: size 3x3 differs from the model's 12x16; skipped" in captured.err
    assert "not a verdict on a part, a sample or a person" in captured.out
    with open(out, newline="", encoding="utf-8") as fh:
        rows = list(csv.DictReader(fh))
    assert tuple(rows[0]) == CHECK_COLUMNS and len(rows) == 7
    flagged = {r["path"].rsplit("/", 1)[-1] for r in rows if r["flag"] == "1"}
    assert flagged == {"img_200.png", "img_201.png"}
    # the same numbers as the core routine; the T2 limit is the F formula (scipy.stats.f)
    d = load_model(model)
    core = check_images(d, [str(tmp / "good"), str(tmp / "bad")], rank=2)
    assert [float(r["q"]) for r in rows] == core.table.q.tolist()
    n = d.n_images
    assert float(rows[0]["t2_limit"]) == pytest.approx(
        2 * (n + 1) * (n - 1) / (n * (n - 2)) * stats.f.ppf(0.99, 2, n - 2), rel=1e-12)
    assert _sha(model) == before


def test_fail_on_flag_exits_3_only_when_an_image_is_flagged(setup, capsys):
    tmp, model = setup
    assert main(["check", str(model), str(tmp / "bad"), "--rank", "2", "--fail-on-flag",
                 "--quiet"]) == 3
    assert main(["check", str(model), str(tmp / "bad"), "--rank", "2", "--quiet"]) == 0
    code = main(["check", str(model), str(tmp / "good"), "--rank", "2", "--fail-on-flag",
                 "--quiet"])
    out = capsys.readouterr().out
    assert code == 0 and "Flagged: 0 of 5 new images" in out


def test_maps_are_written_for_the_flagged_images(setup, capsys):
    tmp, model = setup
    maps = tmp / "maps"
    maps.mkdir()
    assert main(["check", str(model), str(tmp / "good"), str(tmp / "bad"), "--rank", "2",
                 "--maps", str(maps), "--quiet"]) == 0
    names = sorted(p.name for p in maps.iterdir())
    assert "residual_0006.png" in names and "residual_0007.npy" in names
    assert not any(n.startswith("residual_0001") for n in names)
    assert {"t2_contributions.csv", "std_collection.png", "std_unexplained_rank_2.npy",
            "maps.txt"} <= set(names)
    resid = np.load(maps / "residual_0006.npy", allow_pickle=False)
    assert resid.shape == (12, 16, 1)
    assert np.unravel_index(np.argmax(np.abs(resid[..., 0])), (12, 16)) == (3, 4)
    assert "Maps written" in capsys.readouterr().out
    assert "spread evenly over the pixels" in (maps / "maps.txt").read_text()
    # --exact-spread reads the model's images again: numpy.std (ddof=1) of those images
    assert main(["check", str(model), str(tmp / "bad"), "--rank", "2", "--maps", str(maps),
                 "--overwrite", "--exact-spread", "--quiet"]) == 0
    assert "per-pixel energy of the images" in (maps / "maps.txt").read_text()
    ref = np.stack([np.asarray(Image.open(p), dtype=np.float64) / 255
                    for p in sorted((tmp / "ref").iterdir())])
    std = np.load(maps / "std_collection.npy", allow_pickle=False)[..., 0]
    np.testing.assert_allclose(std, np.std(ref, axis=0, ddof=1), rtol=1e-4, atol=1e-6)


def test_bad_input_gives_a_message_and_no_traceback(setup, capsys):
    tmp, model = setup
    broken = tmp / "broken.npz"
    broken.write_bytes(b"not a model")
    assert main(["check", str(broken), str(tmp / "good")]) == 1
    err = capsys.readouterr().err
    assert "modescope check:" in err and "broken.npz" in err and "Traceback" not in err
    assert main(["check", str(model), str(tmp / "nothing_here"), "--quiet"]) == 1
    err = capsys.readouterr().err
    assert "nothing_here" in err and "Traceback" not in err
    assert main(["check", str(model), str(tmp / "good"), "--rank", "7"]) == 2
    assert "--rank must be at most 6" in capsys.readouterr().err
    # the CSV may never replace a source image or the model
    target = tmp / "good" / "img_100.png"
    before = _sha(target)
    assert main(["check", str(model), str(tmp / "good"), "--csv", str(target), "--overwrite",
                 "--quiet"]) == 1
    assert _sha(target) == before
    assert main(["check", str(model), str(tmp / "good"), "--csv", str(model), "--overwrite",
                 "--quiet"]) == 1
    assert "model file" in capsys.readouterr().err
    assert main(["check", str(model), str(tmp / "good"), "--maps", str(tmp / "no_folder"),
                 "--quiet"]) == 1
    assert "--maps" in capsys.readouterr().err
