"""``modescope update MODEL.npz SOURCE... -o OUT.npz``: add images to a saved analysis.

``-o`` may name MODEL.npz itself only with ``--overwrite`` (the old file stays as it is until
the new one is complete). A model left unfinished by an interrupted ``analyze`` is completed:
the images not in it yet are added and the refinement passes run; when every image is already
in it (the run was stopped during the passes), its images are analysed again.
"""

from __future__ import annotations

import argparse
import dataclasses
import sys

from modescope.app.cli.common import (EXIT_OK, EXIT_UNUSABLE, ProgressLine,
                                      add_accuracy_options, cores, failed, print_problems)
from modescope.app.cli.writing import check_output, model_name, same_file
from modescope.app.words import counted
from modescope.core.errors import ModescopeError, NoUsableImagesError
from modescope.core.engine.options import stored_options
from modescope.core.engine.pipeline import analyze, update_analysis
from modescope.core.output.model_file import load_model, save_model
from modescope.core.review.accuracy import describe_accuracy

__all__ = ["register", "run"]


def register(subparsers) -> None:
    """Add the ``update`` verb to an argparse sub-parsers object."""
    u = subparsers.add_parser("update", help="add more images to a model file",
                              description="Stream new images into an existing analysis, then "
                                          "score old and new images exactly.")
    u.add_argument("model", metavar="MODEL.npz")
    u.add_argument("sources", nargs="+", metavar="SOURCE", help="folders or files with new images")
    u.add_argument("-o", "--output", required=True, metavar="OUT.npz",
                   help="model file to write (MODEL.npz itself with --overwrite)")
    u.add_argument("--overwrite", action="store_true",
                   help="replace OUT.npz if it exists, MODEL.npz included (a source image is "
                        "never replaced)")
    u.add_argument("--recursive", action="store_true", help="look into sub-folders")
    add_accuracy_options(u)
    u.add_argument("--quiet", action="store_true", help="no progress display")
    u.set_defaults(func=run)


def _output_refused(args: argparse.Namespace, output, sources) -> bool:
    """Print why ``-o`` cannot be written (True), or return False when it can."""
    if same_file(output, args.model) and not args.overwrite:
        print(f"modescope update: error: -o {output} is the model being updated "
              f"({args.model}); pass --overwrite to replace it with the updated model (the "
              f"old file stays as it is until the new one is complete)", file=sys.stderr)
        return True
    return not check_output("update", "-o", output, overwrite=args.overwrite, sources=sources)


def _compute(d, args, options, progress):
    """Run the update; re-analyse the model's own images when it is unfinished and no image
    is new (an ``analyze`` stopped during its passes)."""
    try:
        return update_analysis(d, args.sources, options, progress=progress)
    except NoUsableImagesError:
        if d.exact or not d.paths:
            raise
    print(f"modescope update: no new image, and {args.model} is an unfinished (streaming) "
          f"model: analysing its images again to finish it", file=sys.stderr)
    sources = list(dict.fromkeys([*d.paths, *args.sources]))
    return analyze(sources, options, progress=progress)


def run(args: argparse.Namespace) -> int:
    """Run ``modescope update``; return the exit code."""
    output = model_name(args.output)
    try:
        d = load_model(args.model)
        if _output_refused(args, output, [*args.sources, *d.paths]):
            return EXIT_UNUSABLE
        # the rank asked for when the model was made, not a partial result's smaller one
        options = dataclasses.replace(stored_options(d), recursive=args.recursive,
                                      oversample=args.oversample, tolerance=args.tolerance,
                                      max_passes=args.max_passes, pass_blas_threads=cores())
        progress = None if args.quiet else ProgressLine(sys.stderr)
        result = _compute(d, args, options, progress)
        new = result.decomposition
        if _output_refused(args, output, [*args.sources, *new.paths]):
            print("modescope update: the model was not written", file=sys.stderr)
            return EXIT_UNUSABLE
        written = save_model(output, new, overwrite=args.overwrite)
    except (ModescopeError, MemoryError, OSError, KeyboardInterrupt) as exc:
        return failed("update", exc)
    old = set(zip(d.paths, d.pages.tolist()))
    added = sum(1 for key in zip(new.paths, new.pages.tolist()) if key not in old)
    left_out = d.n_images - (new.n_images - added)
    print(f"added {counted(added, 'image')} to {counted(d.n_images, 'image')}"
          + (f" ({left_out} old could not be read again and were left out)" if left_out else "")
          + f"; singular values: {describe_accuracy(new)}", file=sys.stderr)
    print(f"wrote {written}", file=sys.stderr)
    print_problems(result.problems, result.source_set.notes)
    return EXIT_OK
