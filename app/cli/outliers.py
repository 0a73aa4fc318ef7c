"""Command line for outlier scores and near-duplicates of a saved model.

Adds two subcommands to the ``modescope`` parser::

    modescope outliers MODEL.npz [--rank K] [--level 0.99] [--top N] [--csv FILE] [--overwrite]
    modescope duplicates MODEL.npz [--rank K] [--tolerance T]

Exit codes: 0 success, 1 unreadable or inconsistent input (the message goes to stderr),
2 wrong usage.
"""

from __future__ import annotations

import argparse
import math
import os
import sys

from modescope.core.errors import ModescopeError

__all__ = ["register", "run", "run_outliers", "run_duplicates", "CAUTION"]

CAUTION = ("Caution: flags are a screening aid for a person to review, not a verdict.")
DUPLICATE_CAUTION = ("Residuals are compared by norm only, so a group can hold images that "
                     "differ outside the basis: check each group by viewing its images.")


def _non_negative_int(text: str) -> int:
    try:
        value = int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected a whole number, got {text!r}") from None
    if value < 0:
        raise argparse.ArgumentTypeError(f"expected a number >= 0, got {value}")
    return value


def _level(text: str) -> float:
    try:
        value = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected a number, got {text!r}") from None
    if not 0.0 < value < 1.0:
        raise argparse.ArgumentTypeError(f"expected a confidence level strictly between 0 "
                                         f"and 1, got {text}")
    return value


def _tolerance(text: str) -> float:
    try:
        value = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected a number, got {text!r}") from None
    if not (math.isfinite(value) and value >= 0):
        raise argparse.ArgumentTypeError(f"expected a finite number >= 0, got {text}")
    return value


def register(subparsers) -> None:
    """Add the ``outliers`` and ``duplicates`` subcommands to an argparse subparsers object.

    Parameters
    ----------
    subparsers : argparse._SubParsersAction
        From ``parser.add_subparsers()``. Each subcommand sets ``func`` to its run function.
    """
    p = subparsers.add_parser(
        "outliers", help="rank the images of a model by how unusual they are",
        description="Score every image of a saved model with the residual statistic Q and "
                    "Hotelling's T2 at rank K, compare them with control limits at the chosen "
                    "confidence level, and list the images most unusual first. An image is "
                    "flagged when score = max(Q/Q limit, T2/T2 limit) > 1.")
    p.add_argument("model", metavar="MODEL.npz", help="model file saved by modescope")
    p.add_argument("--rank", type=_non_negative_int, default=None, metavar="K",
                   help="basis images kept (default: all in the model)")
    p.add_argument("--level", type=_level, default=0.99,
                   help="confidence level of the limits, between 0 and 1 (default 0.99)")
    p.add_argument("--top", type=_non_negative_int, default=20, metavar="N",
                   help="rows to print (default 20; 0 prints every image)")
    p.add_argument("--csv", default=None, metavar="FILE",
                   help="also write every image's scores to this CSV file")
    p.add_argument("--overwrite", action="store_true",
                   help="replace the CSV file if it exists")
    p.set_defaults(func=run_outliers)

    d = subparsers.add_parser(
        "duplicates", help="find groups of near-duplicate images in a model",
        description="Group images whose weights and residual norms are nearly equal. The "
                    "tolerance is a fraction of the root-mean-square centred image norm.")
    d.add_argument("model", metavar="MODEL.npz", help="model file saved by modescope")
    d.add_argument("--rank", type=_non_negative_int, default=None, metavar="K",
                   help="leading modes used to search for candidate pairs (default: all); "
                        "candidates are always confirmed with every mode")
    d.add_argument("--tolerance", type=_tolerance, default=0.02, metavar="T",
                   help="distance limit as a fraction of the RMS image norm (default 0.02)")
    d.set_defaults(func=run_duplicates)


def run(args: argparse.Namespace) -> int:
    """Run the subcommand chosen in ``args`` (``outliers`` or ``duplicates``); return the exit
    code."""
    func = getattr(args, "func", None)
    if func not in (run_outliers, run_duplicates):
        raise ValueError("args must come from a parser set up by register(); no outliers or "
                         "duplicates subcommand chosen")
    return func(args)


def _error(command: str, message: str, code: int) -> int:
    print(f"modescope {command}: error: {message}", file=sys.stderr)
    return code


def _load(path: str):
    from modescope.core.output.model_file import load_model

    return load_model(path)


def _fmt(value: float) -> str:
    if math.isinf(value):
        return "inf"
    return f"{value:.4g}"


def _label(path: str, page: int) -> str:
    return f"{path} [page {page}]" if page else path


def _check_rank(command: str, rank, decomposition) -> int | None:
    if rank is not None and rank > decomposition.rank:
        print(f"modescope {command}: error: --rank must be at most {decomposition.rank} (the "
              f"model has {decomposition.rank} basis images), got {rank}", file=sys.stderr)
        return 2
    return None


def run_outliers(args: argparse.Namespace) -> int:
    """Print the outlier table of a model (and write the CSV when asked); return the exit code."""
    from modescope.core.review.outliers import score_table
    from modescope.core.review.marks import table_rows, write_csv

    try:
        if args.csv is not None and os.path.lexists(args.csv) and not args.overwrite:
            return _error("outliers", f"{args.csv} already exists; use --overwrite to replace "
                                      "it", 1)
        decomposition = _load(args.model)
        code = _check_rank("outliers", args.rank, decomposition)
        if code is not None:
            return code
        table = score_table(decomposition, rank=args.rank, level=args.level)
        rows = table_rows(decomposition, table, "all")
        csv_path = None
        if args.csv is not None:
            csv_path = write_csv(args.csv, decomposition, table, "all",
                                 overwrite=bool(args.overwrite))
    except (ModescopeError, ValueError, OSError) as exc:
        return _error("outliers", str(exc), 1)

    lim = table.limits
    method_q = {"jackson-mudholkar": "Jackson-Mudholkar", "box": "Box chi-square"}[lim.q_method]
    method_t2 = {"beta": "Beta", "f": "F"}[lim.t2_method]
    print(f"Model {args.model}: {table.n_images} images, rank {table.rank} of "
          f"{decomposition.rank}, level {table.level:g}")
    print(f"Q limit {_fmt(lim.q_limit)} ({method_q}); T2 limit {_fmt(lim.t2_limit)} "
          f"({method_t2}, {lim.t2_rank} modes)")
    print(f"Flagged: {table.n_flagged} of {table.n_images} "
          "(score = max(Q/Q limit, T2/T2 limit) > 1)")
    if lim.note:
        print(f"Note: {lim.note}")
    shown = rows if args.top == 0 else rows[:args.top]
    header = ("#", "path", "score", "q", "q_limit", "t2", "t2_limit", "flag")
    body = [(str(rank + 1), _label(r["path"] or f"image {r['index']}", r["page"]),
             _fmt(r["score"]), _fmt(r["q"]), _fmt(r["q_limit"]), _fmt(r["t2"]),
             _fmt(r["t2_limit"]), "yes" if r["flag"] else "no")
            for rank, r in enumerate(shown)]
    widths = [max(len(h), *(len(row[c]) for row in body)) if body else len(h)
              for c, h in enumerate(header)]
    left = {1}
    for row in [header, *body]:
        cells = [cell.ljust(widths[c]) if c in left else cell.rjust(widths[c])
                 for c, cell in enumerate(row)]
        print("  ".join(cells).rstrip())
    if len(shown) < len(rows):
        print(f"({len(shown)} of {len(rows)} images shown; --top 0 shows all)")
    if csv_path is not None:
        print(f"CSV written: {csv_path}")
    print(CAUTION)
    return 0


def run_duplicates(args: argparse.Namespace) -> int:
    """Print the near-duplicate groups of a model; return the exit code."""
    from modescope.core.review.duplicates import find_duplicates

    try:
        decomposition = _load(args.model)
        code = _check_rank("duplicates", args.rank, decomposition)
        if code is not None:
            return code
        report = find_duplicates(decomposition, tolerance=args.tolerance, rank=args.rank)
    except (ModescopeError, ValueError, OSError) as exc:
        return _error("duplicates", str(exc), 1)

    print(f"Model {args.model}: {decomposition.n_images} images; tolerance "
          f"{report.tolerance:g} of the RMS image norm {_fmt(report.rms_norm)} "
          f"(distance <= {_fmt(report.threshold)})")
    if not report.groups:
        print("No near-duplicate groups found.")
    else:
        print(f"{len(report.groups)} groups, {report.n_duplicates} images:")
        for number, group in enumerate(report.groups, start=1):
            print(f"group {number}: {group.size} images, largest distance "
                  f"{_fmt(group.max_distance)} ({group.max_distance_fraction:.3g} of the RMS "
                  "norm)")
            for index, path, page in zip(group.indices, group.paths, group.pages):
                print(f"  [{index}] {_label(path or f'image {index}', page)}")
    print(DUPLICATE_CAUTION)
    return 0
