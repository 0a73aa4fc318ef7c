"""One set of conventions between the command line and the workbench (exact lines).

The confidence level is written "99 %" as in the workbench's Outliers view; the printed table's
"beyond" and "mark" columns use the workbench's words (Q, T2; keep, exclude) while the CSV keeps
1/0 and 0/1/2 for machines and the printed line says so; counts have their plural right and
number columns are right-aligned; ``info`` counts the review marks.
"""

import csv

import numpy as np
import pytest

from modescope.app.cli.main import main
from modescope.app.cli.outliers import beyond_text, level_text, mark_text
from modescope.core.decomposition import Decomposition, fix_signs
from modescope.core.output.model_file import save_model
from modescope.core.review.outliers import score_table


def _decomposition(marks=None) -> Decomposition:
    rng = np.random.default_rng(5)
    x = rng.normal(size=(12, 9)) * np.linspace(3, 1, 12)[:, None]     # 3x4 pixels, 9 images
    x[:, 4] += 6 * rng.normal(size=12)                                 # image 5 stands out
    c = x - x.mean(axis=1, keepdims=True)
    u, s, vt = np.linalg.svd(c, full_matrices=False)                   # LAPACK reference
    basis, weights = fix_signs(u[:, :3], s[:3, None] * vt[:3])
    return Decomposition(
        mean=x.mean(axis=1).astype(np.float32), basis=basis.astype(np.float32),
        singular_values=s[:3].copy(), weights=weights, total_energy=float(np.sum(c ** 2)),
        image_shape=(3, 4, 1), residual=np.sum((c - basis @ weights) ** 2, axis=0),
        exact=True, paths=tuple(f"/data/f{i}.png" for i in range(9)), marks=marks)


@pytest.fixture
def marked_model(tmp_path):
    marks = np.zeros(9, np.int8)
    marks[[0, 1]] = 1             # keep
    marks[4] = 2                  # exclude
    path = tmp_path / "m.npz"
    save_model(path, _decomposition(marks))
    return path


def test_words_of_the_workbench():
    assert level_text(0.99) == "99 %"
    assert level_text(0.995) == "99.5 %"
    assert [beyond_text(q, t) for q, t in ((True, False), (False, True), (True, True),
                                            (False, False))] == ["Q", "T2", "Q, T2", ""]
    assert [mark_text(m) for m in (0, 1, 2)] == ["", "keep", "exclude"]


def test_outliers_lines(marked_model, tmp_path, capsys):
    target = tmp_path / "scores.csv"
    assert main(["outliers", str(marked_model), "--rank", "2", "--top", "4",
                 "--csv", str(target)]) == 0
    lines = capsys.readouterr().out.splitlines()
    assert lines[0] == f"Model {marked_model}: 9 images, rank 2 of 3, level 99 %"
    assert lines[2].endswith("(Beta, 2 modes)")
    assert lines[4] == "Flagged: 1 of 9 images (score = max(Q/Q limit, T2/T2 limit) > 1)"
    table = lines[5:10]
    assert table == [
        "#  number  path           score      q  q_limit     t2  t2_limit  beyond  mark",
        "1       5  /data/f4.png   1.214  1.134    59.24  6.771     5.579  T2      exclude",
        "2       9  /data/f8.png  0.4187   24.8    59.24  0.598     5.579",
        "3       7  /data/f6.png  0.3837   13.6    59.24   2.14     5.579",
        "4       1  /data/f0.png  0.3817  12.82    59.24   2.13     5.579          keep"]
    assert lines[11] == "(4 of 9 images shown; --top 0 shows all)"
    assert lines[12] == (f"CSV written: {target} (flag 1 = beyond a limit, 0 = within both; "
                         "mark 0 = not reviewed, 1 = keep, 2 = exclude)")
    with open(target, newline="", encoding="utf-8") as fh:
        rows = list(csv.DictReader(fh))
    # the CSV keeps numbers for machines: the same images, flag 1/0 and mark 0/1/2
    assert [(r["number"], r["flag"], r["mark"]) for r in rows[:4]] == [
        ("5", "1", "2"), ("9", "0", "0"), ("7", "0", "0"), ("1", "0", "1")]


def test_outliers_table_agrees_with_the_scores(marked_model, capsys):
    assert main(["outliers", str(marked_model), "--rank", "2", "--top", "0"]) == 0
    lines = capsys.readouterr().out.splitlines()
    t = score_table(_decomposition(), rank=2, level=0.99)
    body = lines[6:15]
    assert [int(line.split()[1]) for line in body] == [int(i) + 1 for i in t.order]
    assert sum(1 for line in body if line.split()[8:9] == ["T2"]) == int(t.t2_flag.sum())
    assert sum(1 for line in body if "Q" in line.split()[8:9]) == int(t.q_flag.sum())
    # right-aligned number columns: each score ends at the same place as its header
    end = lines[5].index("score") + len("score")
    assert all(line[end - 1] != " " and line[end] == " " for line in body)


def test_one_image_is_singular(tmp_path, capsys):
    d = _decomposition()
    path = tmp_path / "m.npz"
    save_model(path, d)
    assert main(["outliers", str(path), "--rank", "1", "--top", "1"]) == 0
    lines = capsys.readouterr().out.splitlines()
    assert lines[2].endswith("(Beta, 1 mode)")
    assert "(1 of 9 images shown; --top 0 shows all)" in lines


def test_info_lines(marked_model, capsys):
    assert main(["info", str(marked_model)]) == 0
    lines = capsys.readouterr().out.splitlines()
    assert lines[1] == "images:       9 images"
    top = lines.index("  rank  singular value  certified error  share %  cumulative %")
    assert lines[top + 1:top + 4] == [
        "     1         21.7121                —    66.41         66.41",
        "     2         10.1152                —    14.41         80.82",
        "     3         7.06548                —     7.03         87.86"]
    assert lines[-1] == "review marks: 2 keep, 1 exclude, 6 not reviewed"


def test_info_without_marks_says_nothing_about_them(tmp_path, capsys):
    path = tmp_path / "m.npz"
    save_model(path, _decomposition())
    assert main(["info", str(path)]) == 0
    assert "review marks" not in capsys.readouterr().out


def test_duplicates_plurals(tmp_path, capsys):
    rng = np.random.default_rng(5)
    x = rng.normal(size=(12, 9)) * np.linspace(3, 1, 12)[:, None]
    x[:, 3] = x[:, 2]                            # images 3 and 4 are the same
    c = x - x.mean(axis=1, keepdims=True)
    u, s, vt = np.linalg.svd(c, full_matrices=False)
    basis, weights = fix_signs(u[:, :8], s[:8, None] * vt[:8])
    d = Decomposition(mean=x.mean(axis=1).astype(np.float32), basis=basis.astype(np.float32),
                      singular_values=s[:8].copy(), weights=weights,
                      total_energy=float(np.sum(c ** 2)), image_shape=(3, 4, 1),
                      residual=np.zeros(9), exact=True)
    path = tmp_path / "d.npz"
    save_model(path, d)
    assert main(["duplicates", str(path), "--bounds-only"]) == 0
    lines = capsys.readouterr().out.splitlines()
    assert lines[0].startswith(f"Model {path}: 9 images; tolerance 0.01 of the RMS image norm")
    assert lines[1] == "1 group, 2 images (numbers from 1; distance to the group's first image):"
    assert lines[2].startswith("group 1: 2 images, largest distance ")
    assert [line.split()[0] for line in lines[3:5]] == ["3", "4"]
