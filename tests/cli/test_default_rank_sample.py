"""One default rank and 1-based image numbers, on the bundled sample set.

The sample set (``sample_images/``, 240 invented frames) holds 4 planted problem frames whose
0-based columns come from the generator (``modescope.core.demo.planted_problems``), the outside
reference here. The default rank is the smallest rank capturing 95% of the energy
(``modescope.core.review.rank.default_rank``); on these frames it is 3, and the outlier limits at
that rank flag exactly the planted frames.
"""

import csv
from pathlib import Path

import numpy as np
import pytest

from modescope.app.cli.main import main
from modescope.core.demo import planted_problems
from modescope.core.output.model_file import load_model
from modescope.core.review.rank import default_rank, energy_rank

SAMPLE = Path(__file__).resolve().parents[2] / "sample_images"
PLANTED = sorted(p.index for p in planted_problems(240))


@pytest.fixture(scope="module")
def sample_model(tmp_path_factory):
    out = tmp_path_factory.mktemp("sample") / "sample.npz"
    assert main(["analyze", str(SAMPLE), "-o", str(out), "--quiet"]) == 0
    return out


def _table(out: str):
    lines = out.splitlines()
    header = next(i for i, line in enumerate(lines) if line.split()[:1] == ["#"])
    rows = []
    for line in lines[header + 1:]:
        cells = line.split()
        if not cells or not cells[0].isdigit():
            break
        rows.append(cells)
    return lines[header].split(), rows


def test_default_rank_of_the_sample_set_is_the_95_percent_rank(sample_model):
    d = load_model(sample_model)
    rank, reason = default_rank(d)
    assert rank == energy_rank(d, 0.95).rank == 3
    cum = np.cumsum(np.asarray(d.singular_values, float) ** 2) / d.total_energy
    assert cum[1] < 0.95 <= cum[2]
    assert reason == ("the smallest rank capturing 95 % of the energy "
                      f"(3 modes capture {100 * cum[2]:.1f} %)")


def test_outliers_without_rank_flags_exactly_the_planted_frames(sample_model, tmp_path, capsys):
    d = load_model(sample_model)
    target = tmp_path / "scores.csv"
    assert main(["outliers", str(sample_model), "--top", "0", "--csv", str(target)]) == 0
    out = capsys.readouterr().out
    assert ("Rank 3 of 20: the smallest rank capturing 95 % of the energy (3 modes capture "
            in out)
    assert "; --rank K sets another" in out
    assert "Flagged: 4 of 240" in out
    header, rows = _table(out)
    assert header[:3] == ["#", "number", "path"]
    assert len(rows) == 240
    assert header[-2:] == ["beyond", "mark"]
    flagged = [r for r in rows if float(r[3]) > 1]
    # flagged rows name the limits they are beyond (the workbench's "beyond" column); the
    # others end after t2_limit (nothing beyond, no review mark in a fresh analysis)
    assert all(len(r) > 8 and r[8] in ("Q", "T2", "Q,") for r in flagged)
    assert all(len(r) == 8 for r in rows if float(r[3]) <= 1)
    # the planted frames, printed with 1-based numbers (column + 1), most unusual first
    assert sorted(int(r[1]) for r in flagged) == [i + 1 for i in PLANTED] == [58, 103, 157, 186]
    assert [r[0] for r in flagged] == ["1", "2", "3", "4"]
    for r in rows:
        assert r[2] == d.paths[int(r[1]) - 1]
    with open(target, newline="", encoding="utf-8") as fh:
        table = list(csv.reader(fh))
    assert table[0][:3] == ["number", "path", "page"]
    # the CSV's number column is 1-based and in the printed table's order
    assert [row[0] for row in table[1:]] == [r[1] for r in rows]
    assert sorted(int(row[0]) for row in table[1:]) == list(range(1, 241))
    assert all(row[1] == d.paths[int(row[0]) - 1] for row in table[1:])
    assert sorted(int(row[0]) for row in table[1:] if row[8] == "1") == [58, 103, 157, 186]


def test_outliers_with_rank_says_it_was_given(sample_model, capsys):
    assert main(["outliers", str(sample_model), "--rank", "20", "--top", "3"]) == 0
    out = capsys.readouterr().out
    assert "Rank 20 of 20: given by --rank" in out.splitlines()


def test_info_suggests_the_default_rank(sample_model, capsys):
    assert main(["info", str(sample_model)]) == 0
    out = capsys.readouterr().out
    assert "suggested rank: 3, the smallest rank capturing 95 % of the energy" in out
    assert "other rules:    2 for 90 % of the energy; Gavish-Donoho: not applicable" in out


def test_export_default_rank_and_one_based_images(sample_model, tmp_path, capsys):
    d = load_model(sample_model)
    out = tmp_path / "exp"
    assert main(["export", str(sample_model), "--out", str(out), "--images", "1-3",
                 "--what", "previews,weights", "--quiet"]) == 0
    printed = capsys.readouterr().out
    assert printed.splitlines()[0].startswith(
        "Rank 3 of 20: the smallest rank capturing 95 % of the energy")
    with open(out / "weights_r3.csv", newline="", encoding="utf-8") as fh:
        weights = list(csv.reader(fh))
    # images 1, 2, 3 are the model's columns 0, 1, 2
    assert [row[0] for row in weights[1:]] == list(d.paths[:3])
    assert len([p for p in out.iterdir() if p.name.endswith("_r3.png")]) == 3
    # with --rank the line says so
    assert main(["export", str(sample_model), "--rank", "2", "--out", str(tmp_path / "e2"),
                 "--images", "240", "--what", "weights", "--quiet"]) == 0
    assert capsys.readouterr().out.splitlines()[0] == "Rank 2 of 20: given by --rank"
    with open(tmp_path / "e2" / "weights_r2.csv", newline="", encoding="utf-8") as fh:
        assert [row[0] for row in list(csv.reader(fh))[1:]] == [d.paths[239]]
    # 0 and 241 are not image numbers of a model of 240 images
    for bad in ("0", "241", "0-3"):
        assert main(["export", str(sample_model), "--out", str(tmp_path / "e3"),
                     "--images", bad, "--what", "weights", "--quiet"]) == 2
        assert "image numbers must be 1..240" in capsys.readouterr().err
    assert main(["export", str(sample_model), "--rank", "21", "--out", str(tmp_path / "e4"),
                 "--what", "weights", "--quiet"]) == 2
    assert "--rank must be 1..20" in capsys.readouterr().err
