"""``modescope update MODEL.npz SOURCE... -o OUT.npz``: add images to a saved analysis."""

from __future__ import annotations

import argparse
import dataclasses
import sys

from modescope.app.cli.common import (EXIT_OK, ProgressLine, add_accuracy_options, cores, failed,
                                      print_problems)
from modescope.core.review.accuracy import describe_accuracy
from modescope.core.errors import ModescopeError
from modescope.core.output.model_file import load_model, save_model
from modescope.core.engine.pipeline import AnalysisOptions, update_analysis

__all__ = ["register", "run"]


def register(subparsers) -> None:
    """Add the ``update`` verb to an argparse sub-parsers object."""
    u = subparsers.add_parser("update", help="add more images to a model file",
                                  description="Stream new images into an existing analysis, then score old "
                                              "and new images exactly.")
    u.add_argument("model", metavar="MODEL.npz")
    u.add_argument("sources", nargs="+", metavar="SOURCE", help="folders or files with new images")
    u.add_argument("-o", "--output", required=True, metavar="OUT.npz",
                   help="model file to write (may be MODEL.npz itself)")
    u.add_argument("--recursive", action="store_true", help="look into sub-folders")
    add_accuracy_options(u)
    u.add_argument("--quiet", action="store_true", help="no progress display")
    u.set_defaults(func=run)


def run(args: argparse.Namespace) -> int:
    """Run ``modescope update``; return the exit code."""
    try:
        d = load_model(args.model)
        options = AnalysisOptions.from_dict(d.metadata.get("options", {}))
        options = dataclasses.replace(options, rank=max(d.rank, 1), recursive=args.recursive,
                                      oversample=args.oversample, tolerance=args.tolerance,
                                      max_passes=args.max_passes, pass_blas_threads=cores())
        progress = None if args.quiet else ProgressLine(sys.stderr)
        result = update_analysis(d, args.sources, options, progress=progress)
        written = save_model(args.output, result.decomposition)
    except (ModescopeError, MemoryError, OSError, KeyboardInterrupt) as exc:
        return failed("update", exc)
    new = result.decomposition
    print(f"added {new.n_images - d.n_images} images to {d.n_images}; "
          f"singular values: {describe_accuracy(new)}", file=sys.stderr)
    print(f"wrote {written}", file=sys.stderr)
    print_problems(result.problems)
    return EXIT_OK
