"""``modescope duplicates MODEL.npz``: find groups of near-duplicate images in a model.

Exit codes: 0 success, 1 unreadable or inconsistent input (the message goes to stderr),
2 wrong usage.
"""

from __future__ import annotations

import argparse

from modescope.app.cli.common import check_rank, error, fmt, label, non_negative_int, tolerance
from modescope.core.errors import ModescopeError
from modescope.core.output.model_file import load_model
from modescope.core.review.duplicates import find_duplicates

__all__ = ["register", "run", "CAUTION"]

CAUTION = ("Residuals are compared by norm only, so a group can hold images that "
           "differ outside the basis: check each group by viewing its images.")


def register(subparsers) -> None:
    """Add the ``duplicates`` verb to an argparse sub-parsers object."""
    d = subparsers.add_parser(
        "duplicates", help="find groups of near-duplicate images in a model",
        description="Group images whose weights and residual norms are nearly equal. The "
                    "tolerance is a fraction of the root-mean-square centred image norm.")
    d.add_argument("model", metavar="MODEL.npz", help="model file saved by modescope")
    d.add_argument("--rank", type=non_negative_int, default=None, metavar="K",
                   help="leading modes used to search for candidate pairs (default: all); "
                        "candidates are always confirmed with every mode")
    d.add_argument("--tolerance", type=tolerance, default=0.02, metavar="T",
                   help="distance limit as a fraction of the RMS image norm (default 0.02)")
    d.set_defaults(func=run)


def run(args: argparse.Namespace) -> int:
    """Print the near-duplicate groups of a model; return the exit code."""
    try:
        decomposition = load_model(args.model)
        code = check_rank("duplicates", args.rank, decomposition)
        if code is not None:
            return code
        report = find_duplicates(decomposition, tolerance=args.tolerance, rank=args.rank)
    except (ModescopeError, ValueError, OSError) as exc:
        return error("duplicates", str(exc), 1)

    print(f"Model {args.model}: {decomposition.n_images} images; tolerance "
          f"{report.tolerance:g} of the RMS image norm {fmt(report.rms_norm)} "
          f"(distance <= {fmt(report.threshold)})")
    if not report.groups:
        print("No near-duplicate groups found.")
    else:
        print(f"{len(report.groups)} groups, {report.n_duplicates} images:")
        for number, group in enumerate(report.groups, start=1):
            print(f"group {number}: {group.size} images, largest distance "
                  f"{fmt(group.max_distance)} ({group.max_distance_fraction:.3g} of the RMS "
                  "norm)")
            for index, path, page in zip(group.indices, group.paths, group.pages):
                print(f"  [{index}] {label(path or f'image {index}', page)}")
    print(CAUTION)
    return 0
