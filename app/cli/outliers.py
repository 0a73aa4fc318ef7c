"""``modescope outliers MODEL.npz``: rank the images of a model by how unusual they are.

Exit codes: 0 success, 1 unreadable or inconsistent input or a refused ``--csv`` file (the
message goes to stderr), 2 wrong usage, 130 interrupted. The CSV file is never a source image
or the model file, whatever ``--overwrite`` says.
"""

from __future__ import annotations

import argparse
import os

from modescope.app.cli.common import (check_rank, error, fmt, label, level, non_negative_int,
                                      resolve_rank)
from modescope.app.cli.writing import check_output
from modescope.app.words import counted
from modescope.core.errors import ModescopeError
from modescope.core.output.model_file import load_model
from modescope.core.review.marks import table_rows, write_csv
from modescope.core.review.outliers import Q_METHOD_NAMES, score_table

__all__ = ["register", "run", "CAUTION", "CSV_NOTE", "level_text", "beyond_text", "mark_text"]

CAUTION = ("Caution: flags are a screening aid for a person to review, not a verdict.")
CSV_NOTE = ("flag 1 = beyond a limit, 0 = within both; mark 0 = not reviewed, 1 = keep, "
            "2 = exclude")
_MARK_TEXT = {1: "keep", 2: "exclude"}


def level_text(level: float) -> str:
    """Return a confidence level as the workbench writes it: 0.99 -> "99 %"."""
    return f"{100 * float(level):g} %"


def beyond_text(q_flag: bool, t2_flag: bool) -> str:
    """Return the limits an image is beyond as the workbench's "beyond" column writes them
    ("Q", "T2", "Q, T2", or "" when within both)."""
    return ", ".join(name for name, on in (("Q", q_flag), ("T2", t2_flag)) if on)


def mark_text(mark: int) -> str:
    """Return a review mark as the workbench writes it ("keep", "exclude", "" when none)."""
    return _MARK_TEXT.get(int(mark), "")


def register(subparsers) -> None:
    """Add the ``outliers`` verb to an argparse sub-parsers object."""
    p = subparsers.add_parser(
        "outliers", help="rank the images of a model by how unusual they are",
        description="Score every image of a saved model with the residual statistic Q and "
                    "Hotelling's T2 at rank K, compare them with control limits at the chosen "
                    "confidence level, and list the images most unusual first. An image is "
                    "flagged when score = max(Q/Q limit, T2/T2 limit) > 1. Images are "
                    "numbered from 1 in column order, as in the desktop program. Without "
                    "--rank, the default rank is the smallest capturing 95 % of the energy.")
    p.add_argument("model", metavar="MODEL.npz", help="model file saved by modescope")
    p.add_argument("--rank", type=non_negative_int, default=None, metavar="K",
                   help="basis images kept (default: the smallest rank capturing 95 %% of "
                        "the energy, or all in the model when they capture less)")
    p.add_argument("--level", type=level, default=0.99,
                   help="confidence level of the limits, between 0 and 1 (default 0.99, "
                        "printed as 99 %%, as in the desktop program)")
    p.add_argument("--top", type=non_negative_int, default=20, metavar="N",
                   help="rows to print (default 20; 0 prints every image)")
    p.add_argument("--csv", default=None, metavar="FILE",
                   help="also write every image's scores to this CSV file")
    p.add_argument("--overwrite", action="store_true",
                   help="replace the CSV file if it exists (a source image or the model file "
                        "is never replaced)")
    p.set_defaults(func=run)


def run(args: argparse.Namespace) -> int:
    """Print the outlier table of a model (and write the CSV when asked); return the exit code."""
    try:
        if args.csv is not None and os.path.lexists(args.csv) and not args.overwrite:
            return error("outliers", f"{args.csv} already exists; use --overwrite to replace "
                                      "it", 1)
        decomposition = load_model(args.model)
        code = check_rank("outliers", args.rank, decomposition)
        if code is not None:
            return code
        rank, rank_line = resolve_rank(args.rank, decomposition)
        table = score_table(decomposition, rank=rank, level=args.level)
        rows = table_rows(decomposition, table, "all")
        csv_path = None
        if args.csv is not None:
            if not check_output("outliers", "--csv", args.csv, overwrite=bool(args.overwrite),
                                sources=decomposition.paths, inputs=[args.model]):
                return 1
            csv_path = write_csv(args.csv, decomposition, table, "all",
                                 overwrite=bool(args.overwrite))
    except (ModescopeError, ValueError, OSError) as exc:
        return error("outliers", str(exc), 1)

    lim = table.limits
    method_q = Q_METHOD_NAMES.get(lim.q_method, lim.q_method)
    method_t2 = {"beta": "Beta", "f": "F"}[lim.t2_method]
    n_images = counted(table.n_images, "image")
    print(f"Model {args.model}: {n_images}, rank {table.rank} of "
          f"{decomposition.rank}, level {level_text(table.level)}")
    print(rank_line)
    print(f"Q limit {fmt(lim.q_limit)} ({method_q}); T2 limit {fmt(lim.t2_limit)} "
          f"({method_t2}, {counted(lim.t2_rank, 'mode')})")
    print(f"Q limit method: {lim.q_reason}.")
    print(f"Flagged: {table.n_flagged:,} of {n_images} "
          "(score = max(Q/Q limit, T2/T2 limit) > 1)")
    if lim.note:
        print(f"Note: {lim.note}")
    shown = rows if args.top == 0 else rows[:args.top]
    _print_table(table, shown)
    print("(# = place, most unusual first; number = the image's number, 1-based, as in the "
          "desktop program and the CSV; beyond = the limits the image is beyond, flagged when "
          "any; mark = review mark)")
    if len(shown) < len(rows):
        print(f"({len(shown):,} of {counted(len(rows), 'image')} shown; --top 0 shows all)")
    if csv_path is not None:
        print(f"CSV written: {csv_path} ({CSV_NOTE})")
    print(CAUTION)
    return 0


def _print_table(table, shown: list[dict]) -> None:
    """Print the rows with every number column right-aligned under its header."""
    header = ("#", "number", "path", "score", "q", "q_limit", "t2", "t2_limit", "beyond",
              "mark")
    body = [(str(place + 1), str(r["number"]),
             label(r["path"] or f"image {r['number']}", r["page"]),
             fmt(r["score"]), fmt(r["q"]), fmt(r["q_limit"]), fmt(r["t2"]),
             fmt(r["t2_limit"]),
             beyond_text(table.q_flag[r["index"]], table.t2_flag[r["index"]]),
             mark_text(r["mark"]))
            for place, r in enumerate(shown)]
    widths = [max(len(h), *(len(row[c]) for row in body)) if body else len(h)
              for c, h in enumerate(header)]
    left = {2, 8, 9}
    for row in [header, *body]:
        cells = [cell.ljust(widths[c]) if c in left else cell.rjust(widths[c])
                 for c, cell in enumerate(row)]
        print("  ".join(cells).rstrip())
