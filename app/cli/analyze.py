"""``modescope analyze SOURCE... -o MODEL.npz``: stream images through the SVD, write the model."""

from __future__ import annotations

import argparse
import shlex
import sys
import time
from pathlib import Path

from modescope.app.cli.common import (EXIT_INTERRUPTED, EXIT_OK, EXIT_UNUSABLE, EXIT_USAGE,
                                      InterruptFlag, ProgressLine, add_accuracy_options, cores, failed,
                                      positive_int, print_problems)
from modescope.app.cli.writing import check_output, model_name
from modescope.core.review.accuracy import describe_accuracy
from modescope.app.words import counted
from modescope.core.engine.cluster import ClusterError
from modescope.core.errors import ModescopeError
from modescope.core.output.model_file import save_model
from modescope.core.engine.pipeline import AnalysisOptions, analyze

__all__ = ["register", "resume_command", "run"]


def register(subparsers) -> None:
    """Add the ``analyze`` verb to an argparse sub-parsers object."""
    a = subparsers.add_parser("analyze", help="analyse folders/files of images into a model file",
                                  description="Stream images through a mean-centred truncated SVD and "
                                              "write the model file.")
    a.add_argument("sources", nargs="+", metavar="SOURCE", help="folders or image files")
    a.add_argument("-o", "--output", required=True, metavar="MODEL.npz", help="model file to write")
    a.add_argument("--overwrite", action="store_true",
                   help="replace the model file if it exists (a source image is never replaced)")
    a.add_argument("--rank", type=positive_int, default=20, metavar="K",
                   help="number of basis images (default 20)")
    a.add_argument("--color", choices=("gray", "rgb"), default="gray",
                   help="analyse luma (gray, default) or three channels (rgb)")
    a.add_argument("--downscale", type=positive_int, default=1, metavar="F",
                   help="average F x F pixel blocks before analysis (default 1)")
    a.add_argument("--recursive", action="store_true", help="look into sub-folders")
    a.add_argument("--resize-mismatched", action="store_true",
                   help="resize images of another size to the most common size instead of "
                        "skipping them")
    a.add_argument("--frames", type=_frames, default=None, metavar="START:STOP[:STEP]",
                   help="frames taken from each video or .npy stack, numbered from 0 as in the "
                        "page column of the tables, STOP excluded (like a Python slice): "
                        "0:100:2 takes frames 0, 2, ..., 98; ::5 every fifth frame "
                        "(default: every frame)")
    a.add_argument("--frame-rate", type=_frame_rate, default=None, metavar="HZ",
                   help="frames per second of the sources (a folder of frames, a .npy stack, "
                        "or a video whose own rate is wrong); default: the video's own rate. "
                        "The model stores HZ divided by the --frames step")
    a.add_argument("--block-size", type=positive_int, default=128, metavar="B",
                   help="images per streaming update (default 128)")
    add_accuracy_options(a)
    a.add_argument("--no-refine", action="store_true",
                   help="one plain scoring pass: no Rayleigh-Ritz rotation, no refinement "
                        "and no certificate")
    a.add_argument("--workers", type=int, default=0,
                   help="decoding threads (default 0: chosen from the image size)")
    a.add_argument("--engine", choices=("local", "dask"), default="local",
                   help="where the analysis runs: this machine (local, default) or a Dask "
                        "cluster (dask; needs pip install 'modescope[cluster]')")
    a.add_argument("--scheduler", metavar="ADDRESS", default=None,
                   help="with --engine dask: address of a running Dask scheduler, such as "
                        "tcp://10.0.0.5:8786 (default: start a local cluster on this machine)")
    a.add_argument("--quiet", action="store_true", help="no progress display")
    a.set_defaults(func=run)


def run(args: argparse.Namespace) -> int:
    """Run ``modescope analyze``; return the exit code."""
    try:
        options = AnalysisOptions(rank=args.rank, color=args.color, downscale=args.downscale,
                                  recursive=args.recursive,
                                  resize_mismatched=args.resize_mismatched,
                                  block_size=args.block_size, oversample=args.oversample,
                                  refine=not args.no_refine, workers=args.workers,
                                  tolerance=args.tolerance, max_passes=args.max_passes,
                                  pass_blas_threads=cores(), frames=args.frames,
                                  frame_rate=args.frame_rate)
    except (TypeError, ValueError) as exc:
        print(f"modescope analyze: {exc}", file=sys.stderr)
        return EXIT_USAGE
    if getattr(args, "scheduler", None) is not None and getattr(args, "engine", "local") != "dask":
        print("modescope analyze: --scheduler needs --engine dask", file=sys.stderr)
        return EXIT_USAGE
    output = Path(args.output)
    if output.exists() and output.is_dir():
        print(f"modescope analyze: {output}: is a folder; give a file name such as "
              f"{output / 'model.npz'}", file=sys.stderr)
        return EXIT_USAGE
    output = model_name(output)
    if not check_output("analyze", "-o", output, overwrite=args.overwrite, sources=args.sources):
        return EXIT_UNUSABLE
    start = time.perf_counter()
    progress = None if args.quiet else ProgressLine(sys.stderr)
    stop = InterruptFlag("modescope analyze: stopping after the current block; the images "
                         "analysed so far will be written (Ctrl-C again to stop at once and "
                         "write nothing)")
    try:
        with stop:
            result = _analyze(args, options, progress, stop)
    except ClusterError as exc:               # the cluster, not the images: no "nothing usable"
        return failed("analyze", exc)
    except (ModescopeError, MemoryError, OSError, KeyboardInterrupt) as exc:
        return failed("analyze", exc, unusable="nothing usable: ",
                       memory_hint="; try --downscale 2 (or more) or a smaller --block-size")
    d = result.decomposition
    if result.cancelled and d is None:
        print("modescope analyze: interrupted before any image was analysed; nothing written",
              file=sys.stderr)
        return EXIT_INTERRUPTED
    if not check_output("analyze", "-o", output, overwrite=args.overwrite,
                        sources=[*args.sources, *d.paths]):
        print("modescope analyze: the model was not written", file=sys.stderr)
        return EXIT_UNUSABLE
    try:
        written = save_model(output, d, overwrite=args.overwrite)
    except ModescopeError as exc:
        print(f"modescope analyze: {exc}", file=sys.stderr)
        return EXIT_UNUSABLE
    if result.cancelled and d.exact:
        passes = d.metadata.get("refinement", {}).get("passes", 0)
        print(f"modescope analyze: interrupted during the refinement passes; wrote the result "
              f"of the last complete pass ({passes} of at most "
              f"{d.metadata.get('refinement', {}).get('max_passes', passes)}) to {written}; "
              f"singular values: {describe_accuracy(d)}", file=sys.stderr)
        print_problems(result.problems, result.source_set.notes)
        return EXIT_INTERRUPTED
    if result.cancelled:
        print(f"modescope analyze: interrupted; wrote the streaming result of "
              f"{counted(d.n_images, 'image')} to {written} (not final: run\n  "
              f"{resume_command(args, written)}\nto add the images not analysed yet and run the "
              f"refinement passes)", file=sys.stderr)
        print_problems(result.problems, result.source_set.notes)
        return EXIT_INTERRUPTED
    elapsed = time.perf_counter() - start
    rows, cols, ch = d.image_shape
    cum = d.cumulative_energy()
    if d.rank:
        captured = f"rank {d.rank} captures {100 * cum[-1]:.1f} % of the energy"
    else:
        captured = ("no basis images: the images do not vary (each one equals the mean image"
                    + (", as a single image always does)" if d.n_images == 1 else ")"))
    print(f"analysed {counted(d.n_images, 'image')} of {rows}x{cols} "
          f"({'gray' if ch == 1 else 'rgb'}) in {elapsed:.1f} s; {captured}", file=sys.stderr)
    print(f"singular values: {describe_accuracy(d)}", file=sys.stderr)
    if "frame_rate" in d.metadata:
        print(f"time axis: {d.metadata['frame_rate']:g} images per second", file=sys.stderr)
    print(f"wrote {written}", file=sys.stderr)
    print_problems(result.problems, result.source_set.notes)
    return EXIT_OK


def _frames(text: str):
    """argparse type of ``--frames``."""
    from modescope.core.sources.frames import parse_frames
    try:
        return parse_frames(text)
    except ValueError as exc:
        raise argparse.ArgumentTypeError(str(exc)) from None


def _frame_rate(text: str) -> float:
    """argparse type of ``--frame-rate``: a positive finite number of frames per second."""
    from modescope.core.sources.frames import check_frame_rate
    try:
        return check_frame_rate("--frame-rate", float(text))
    except ValueError as exc:
        message = str(exc) if "frame" in str(exc) else f"expected a number, got {text!r}"
        raise argparse.ArgumentTypeError(message) from None


def _analyze(args: argparse.Namespace, options: AnalysisOptions, progress, cancel):
    """Run the analysis on the engine asked for (``--engine``, ``--scheduler``)."""
    if getattr(args, "engine", "local") == "dask":
        from modescope.core.engine.cluster import analyze_on_cluster
        return analyze_on_cluster(args.sources, options, scheduler=args.scheduler,
                                  progress=progress, cancel=cancel)
    return analyze(args.sources, options, progress=progress, cancel=cancel)


def resume_command(args: argparse.Namespace, written) -> str:
    """Return the ``modescope update`` command that completes an interrupted analysis.

    Parameters
    ----------
    args : argparse.Namespace
        The arguments of the interrupted ``analyze``.
    written : str or os.PathLike
        The partial model file.

    Returns
    -------
    str
        A command line, quoted for a POSIX shell, that works when typed as printed.
    """
    from modescope.core.engine.options import AnalysisOptions
    defaults = AnalysisOptions()
    def word(path) -> str:        # a name starting with "-" would be read as an option
        text = str(path)
        return f"./{text}" if text.startswith("-") else text
    words = ["modescope", "update", word(written), *map(word, args.sources), "-o",
             word(written), "--overwrite"]
    if args.recursive:
        words.append("--recursive")
    for option, value, default in (("--oversample", args.oversample, defaults.oversample),
                                   ("--tolerance", args.tolerance, defaults.tolerance),
                                   ("--max-passes", args.max_passes, defaults.max_passes)):
        if value != default:
            words += [option, repr(value) if isinstance(value, float) else str(value)]
    return " ".join(shlex.quote(w) for w in words)
