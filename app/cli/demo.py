"""The ``demo`` subcommand: write the invented seed-tray demo collection to a folder.

``modescope demo OUT_DIR [--frames N] [--size ROWSxCOLS] [--seed S] [--format jpg|png]
[--quality Q] [--workers W] [--overwrite]``

Exit codes: 0 when every frame was written, 1 when writing failed (disk full, no permission),
2 for invalid arguments (including a non-empty OUT_DIR without ``--overwrite``), 130 when
interrupted.
"""

from __future__ import annotations

import argparse
import re
import sys

from modescope.core import demo
from modescope.core.output.atomic import DestinationError
from modescope.app.cli.common import EXIT_INTERRUPTED, CountProgress

__all__ = ["register", "run"]

_SIZE_RE = re.compile(r"^\s*(\d+)\s*[xX]\s*(\d+)\s*$")


def _parse_size(text: str) -> tuple[int, int]:
    match = _SIZE_RE.match(text)
    if not match:
        raise argparse.ArgumentTypeError(
            f"--size must look like ROWSxCOLS (for example 96x128), got {text!r}")
    return int(match.group(1)), int(match.group(2))


def register(subparsers) -> argparse.ArgumentParser:
    """Add the ``demo`` subcommand to an argparse subparsers object.

    Parameters
    ----------
    subparsers : argparse._SubParsersAction
        The object returned by ``ArgumentParser.add_subparsers()``.

    Returns
    -------
    argparse.ArgumentParser
        The new subcommand's parser; its default ``func`` is :func:`run`.
    """
    parser = subparsers.add_parser(
        "demo",
        help="write the invented seed-germination-tray demo collection",
        description=(
            "Write the invented demo collection: a fixed camera above a seed-germination tray "
            "taking a colour frame every 240/N hours over ten days, with a day/night lamp "
            "cycle, growing seedlings, watering, a slow colour drift and a few planted problem "
            "frames (glove, fog, over-exposure, tray pulled out). The output is deterministic "
            "for given --frames, --size and --seed."),
    )
    parser.add_argument("out_dir", metavar="OUT_DIR", help="folder to write the frames into")
    parser.add_argument("--frames", type=int, default=240, metavar="N",
                        help="number of frames (default 240: one an hour for ten days)")
    parser.add_argument("--size", type=_parse_size, default=(96, 128), metavar="ROWSxCOLS",
                        help="frame size in pixels, rows x columns (default 96x128)")
    parser.add_argument("--seed", type=int, default=7, metavar="S",
                        help="seed of the scene and noise (default 7)")
    parser.add_argument("--format", dest="fmt", choices=("jpg", "png"), default="jpg",
                        help="file format (default jpg)")
    parser.add_argument("--quality", type=int, default=90, metavar="Q",
                        help="JPEG quality 1-100 (default 90)")
    parser.add_argument("--workers", type=int, default=1, metavar="W",
                        help="threads rendering and writing frames (default 1)")
    parser.add_argument("--overwrite", action="store_true",
                        help="allow a non-empty OUT_DIR; older demo frames in it are replaced")
    parser.set_defaults(func=run)
    return parser


def run(args: argparse.Namespace) -> int:
    """Write the demo collection described by parsed arguments.

    Parameters
    ----------
    args : argparse.Namespace
        With ``out_dir``, ``frames``, ``size``, ``seed``, ``fmt``, ``quality``, ``workers`` and
        ``overwrite`` as set by :func:`register`.

    Returns
    -------
    int
        0 on success, 1 when writing failed, 2 for invalid arguments, 130 when interrupted.
    """
    progress = CountProgress(sys.stderr, "demo", "frames")
    try:
        paths = demo.write_collection(
            args.out_dir, args.frames, size=tuple(args.size), seed=args.seed, fmt=args.fmt,
            quality=args.quality, progress=progress, workers=args.workers,
            overwrite=args.overwrite)
    except DestinationError as exc:     # before ValueError: it is one, but not a usage error
        if progress.tty:
            print(file=sys.stderr)
        print(f"modescope demo: error: could not write the collection: {exc}", file=sys.stderr)
        return 1
    except (TypeError, ValueError) as exc:
        print(f"modescope demo: error: {exc}", file=sys.stderr)
        return 2
    except OSError as exc:
        if progress.tty:
            print(file=sys.stderr)
        print(f"modescope demo: error: could not write the collection: {exc}", file=sys.stderr)
        return 1
    except KeyboardInterrupt:
        print("\nmodescope demo: interrupted; the frames written so far are complete files",
              file=sys.stderr)
        return EXIT_INTERRUPTED
    rows, cols = args.size
    print(f"wrote {len(paths)} frames of {rows}x{cols} to {args.out_dir}")
    problems = demo.planted_problems(args.frames)
    if problems:
        print("planted problem frames:")
        for p in problems:
            print(f"  {paths[p.index].name}  {p.kind}")
    return 0
