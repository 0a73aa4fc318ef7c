"""``modescope duplicates MODEL.npz``: find groups of near-duplicate images in a model.

Every pair in a printed group is within the tolerance in pixel space: confirmed by an upper
bound of the distance or, when the bounds straddle the tolerance, measured on the source
images (unless ``--bounds-only``). Images are numbered from 1, as in the desktop program.

Exit codes: 0 success, 1 unreadable or inconsistent input or a refused ``--csv`` file (the
message goes to stderr), 2 wrong usage.
"""

from __future__ import annotations

import argparse
import os

from modescope.app.cli.common import check_rank, error, fmt, label, non_negative_int, tolerance
from modescope.app.cli.writing import check_output
from modescope.app.words import counted
from modescope.core.engine.pipeline import load_analysis_image
from modescope.core.errors import ModescopeError
from modescope.core.output.model_file import load_model
from modescope.core.review.duplicates import (DEFAULT_TOLERANCE, find_duplicates,
                                              write_groups_csv)

__all__ = ["register", "run", "CAUTION"]

CAUTION = ("Every pair in a group is within the tolerance: measured on the images, or by an "
           "upper bound of the distance computed from the model.")


def register(subparsers) -> None:
    """Add the ``duplicates`` verb to an argparse sub-parsers object."""
    d = subparsers.add_parser(
        "duplicates", help="find groups of near-duplicate images in a model",
        description="Group images whose pixel distance is within the tolerance, every pair "
                    "of a group included (no chaining). The tolerance is a fraction of the "
                    "root-mean-square centred image norm; candidates come from the weights and "
                    "are confirmed by an upper bound or on the source images.")
    d.add_argument("model", metavar="MODEL.npz", help="model file saved by modescope")
    d.add_argument("--rank", type=non_negative_int, default=None, metavar="K",
                   help="leading modes used to search for candidate pairs (default: all); "
                        "candidates are always bounded with every mode")
    d.add_argument("--tolerance", type=tolerance, default=DEFAULT_TOLERANCE, metavar="T",
                   help="distance limit as a fraction of the RMS image norm (default "
                        f"{DEFAULT_TOLERANCE:g}: the closest ordinary neighbouring frames of the "
                        "sample set are 0.035 apart)")
    d.add_argument("--bounds-only", action="store_true",
                   help="do not read the source images: pairs the bounds cannot decide are "
                        "left out")
    d.add_argument("--csv", default=None, metavar="FILE",
                   help="also write the groups to this CSV file (columns group, number, path, "
                        "distance)")
    d.add_argument("--overwrite", action="store_true",
                   help="replace the CSV file if it exists (a source image or the model file "
                        "is never replaced)")
    d.set_defaults(func=run)


def _print_report(args, decomposition, report) -> None:
    print(f"Model {args.model}: {counted(decomposition.n_images, 'image')}; tolerance "
          f"{report.tolerance:g} of the RMS image norm {fmt(report.rms_norm)} "
          f"(distance <= {fmt(report.threshold)})")
    if not report.groups:
        print("No near-duplicate groups found.")
    else:
        print(f"{counted(len(report.groups), 'group')}, "
              f"{counted(report.n_duplicates, 'image')} "
              "(numbers from 1; distance to the group's first image):")
        for g, group in enumerate(report.groups, start=1):
            print(f"group {g}: {counted(group.size, 'image')}, largest distance "
                  f"{fmt(group.max_distance)} ({group.max_distance_fraction:.3g} of the RMS "
                  "norm)")
            width = len(str(max(group.indices) + 1))
            for index, path, page, dist in zip(group.indices, group.paths, group.pages,
                                               group.distances):
                name = label(path or f"image {index + 1}", page)
                print(f"  {index + 1:>{width}}  {fmt(dist):>10}  {name}")
    if report.n_measured:
        print(f"{counted(report.n_measured, 'pair')} measured on the source images.")
    if report.n_unsure:
        why = ("--bounds-only" if args.bounds_only
               else f"{counted(len(report.unreadable), 'image')} could not be read")
        print(f"{counted(report.n_unsure, 'pair')} left out: their bounds straddle the "
              f"tolerance and their images were not compared ({why}).")


def run(args: argparse.Namespace) -> int:
    """Print the near-duplicate groups of a model (and write the CSV when asked)."""
    try:
        if args.csv is not None and os.path.lexists(args.csv) and not args.overwrite:
            return error("duplicates", f"{args.csv} already exists; use --overwrite to "
                                       "replace it", 1)
        decomposition = load_model(args.model)
        code = check_rank("duplicates", args.rank, decomposition)
        if code is not None:
            return code
        read = None if args.bounds_only else (
            lambda i: load_analysis_image(decomposition, i))
        report = find_duplicates(decomposition, tolerance=args.tolerance, rank=args.rank,
                                 read_image=read)
        csv_path = None
        if args.csv is not None:
            if not check_output("duplicates", "--csv", args.csv, overwrite=bool(args.overwrite),
                                sources=decomposition.paths, inputs=[args.model]):
                return 1
            csv_path = write_groups_csv(args.csv, report, overwrite=bool(args.overwrite),
                                        protect=decomposition.paths)
    except (ModescopeError, ValueError, OSError) as exc:
        return error("duplicates", str(exc), 1)
    _print_report(args, decomposition, report)
    if csv_path is not None:
        print(f"CSV written: {csv_path}")
    print(CAUTION)
    return 0
