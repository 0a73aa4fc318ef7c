"""The ``export`` subcommand: write previews, basis images, tables and a compact model.

``modescope export MODEL.npz [--rank K] --out DIR [--what previews,basis,sheet,weights,spectrum,
quality,model] [--format png|jpg|webp|tiff] [--quality Q] [--images all|flagged|LIST]
[--level 0.99] [--upsample] [--float16] [--overwrite] [--allow-source-folder]``

Without ``--rank`` the default rank of every front end is used
(:func:`modescope.core.review.rank.default_rank`); the rank used and why is printed first.
``LIST`` is a comma list of 1-based image numbers and ranges (``1,4,10-19``; image 1 is the
model's first image, as in the desktop program and ``outliers``) or the name of a
text file holding one source path per line (blank lines and lines starting with ``#`` are
skipped; every page of a multi-page file is taken).

Progress goes to stderr, the summary to stdout. Exit codes: 0 done (notes such as missing
sources are printed), 1 the model cannot be read or the destination is refused or fails
(existing files, source folder, read-only, disk full), 2 invalid arguments, 130 interrupted
(Ctrl-C or SIGTERM stops after the current file; completed files are kept). A source image of
the model and the model file itself are never replaced, whatever ``--overwrite`` and
``--allow-source-folder`` say.
"""

from __future__ import annotations

import argparse
import os
import re
import sys
from pathlib import Path

from modescope.app.cli.common import (EXIT_INTERRUPTED, CountProgress, InterruptFlag,
                                      resolve_rank)
from modescope.core.errors import ModescopeError

__all__ = ["register", "run", "parse_image_list"]

EXIT_OK, EXIT_FAILED, EXIT_USAGE = 0, 1, 2
_WHAT = ("previews", "basis", "sheet", "weights", "spectrum", "quality", "model")
_RANGE_RE = re.compile(r"^\s*(\d+)\s*(?:-\s*(\d+)\s*)?$")


def register(subparsers) -> argparse.ArgumentParser:
    """Add the ``export`` subcommand to an argparse subparsers object.

    Parameters
    ----------
    subparsers : argparse._SubParsersAction
        The object returned by ``ArgumentParser.add_subparsers()``.

    Returns
    -------
    argparse.ArgumentParser
        The new subcommand's parser; its default ``func`` is :func:`run`.
    """
    p = subparsers.add_parser(
        "export", help="write rank-k previews, basis images, CSV tables and a compact model",
        description=(
            "Write the rank-K reconstruction of chosen images, the mean and basis images, a "
            "contact sheet, CSV tables (weights, spectrum, reconstruction quality) and a model "
            "truncated to rank K into a folder. Every file is written under a temporary name "
            "and renamed when complete; existing files are never replaced without --overwrite."))
    p.add_argument("model", metavar="MODEL.npz", help="model file written by 'modescope analyze'")
    p.add_argument("--rank", type=int, default=None, metavar="K",
                   help="number of basis images used (1 to the model's rank; default: the "
                        "smallest rank capturing 95 %% of the energy, or all in the model when "
                        "they capture less)")
    p.add_argument("--out", required=True, metavar="DIR",
                   help="destination folder (created when missing)")
    p.add_argument("--what", default=",".join(_WHAT), metavar="PARTS",
                   help=f"comma list of {', '.join(_WHAT)} (default: all)")
    p.add_argument("--format", dest="image_format", choices=("png", "jpg", "webp", "tiff"),
                   default="png", help="preview format: 8-bit png/jpg/webp or 16-bit tiff "
                                       "(default png)")
    p.add_argument("--quality", type=int, default=90, metavar="Q",
                   help="JPEG/WebP quality 1-100 (default 90)")
    p.add_argument("--images", default="all", metavar="all|flagged|LIST",
                   help="images for previews and per-image tables: all (default), flagged "
                        "(outliers at --level), a comma list of 1-based image numbers and "
                        "ranges such as 1,4,10-19 (as the desktop program and 'outliers' "
                        "number them), or a text file of source paths")
    p.add_argument("--level", type=float, default=0.99, metavar="P",
                   help="confidence level of the outlier limits for --images flagged "
                        "(default 0.99)")
    p.add_argument("--upsample", action="store_true",
                   help="write previews at the source size when the analysis was downscaled")
    p.add_argument("--float16", action="store_true",
                   help="store the compact model's mean, basis and weights as float16")
    p.add_argument("--sheet-count", type=int, default=16, metavar="N",
                   help="basis images on the contact sheet (default 16)")
    p.add_argument("--overwrite", action="store_true",
                   help="replace existing files (never a source image or the model file)")
    p.add_argument("--allow-source-folder", action="store_true",
                   help="allow writing into a folder that holds source images (they are never "
                        "replaced)")
    p.add_argument("--quiet", action="store_true", help="no progress display")
    p.set_defaults(func=run)
    return p


def parse_image_list(text: str, decomposition) -> list[int]:
    """Turn a ``--images`` LIST of 1-based image numbers into 0-based image indices.

    Parameters
    ----------
    text : str
        A comma list of 1-based image numbers and inclusive ranges (``"1,4,10-19"``; number
        ``n`` is column ``n - 1``), or the name of an existing text file with one source path
        per line.
    decomposition : Decomposition
        The model the indices refer to.

    Returns
    -------
    list of int
        0-based indices in the order given, duplicates removed (``"1-3"`` gives
        ``[0, 1, 2]``).

    Raises
    ------
    ValueError
        If an entry is not a number or range, is out of 1..images, or a path of the file is not a
        source of the model (the message names the entries).
    """
    m = decomposition.n_images
    if os.path.isfile(text):
        by_path: dict[str, list[int]] = {}
        for i, p in enumerate(decomposition.paths):
            by_path.setdefault(os.path.normcase(os.path.abspath(p)), []).append(i)
        out: list[int] = []
        unknown: list[str] = []
        with open(text, encoding="utf-8") as fh:
            for line in fh:
                line = line.strip()
                if not line or line.startswith("#"):
                    continue
                found = by_path.get(os.path.normcase(os.path.abspath(line)))
                if found is None:
                    unknown.append(line)
                else:
                    out.extend(found)
        if unknown:
            shown = ", ".join(unknown[:5]) + (f" and {len(unknown) - 5} more"
                                              if len(unknown) > 5 else "")
            raise ValueError(f"--images {text}: {len(unknown)} path(s) are not sources of this "
                             f"model: {shown}")
        return list(dict.fromkeys(out))
    out = []
    for part in text.split(","):
        if not part.strip():
            continue
        match = _RANGE_RE.match(part)
        if not match:
            raise ValueError(f"--images must be all, flagged, an existing file of paths, or a "
                             f"comma list of image numbers and ranges such as 1,4,10-19; "
                             f"{part.strip()!r} is none of these")
        lo = int(match.group(1))
        hi = int(match.group(2)) if match.group(2) is not None else lo
        if hi < lo:
            raise ValueError(f"--images range {part.strip()!r} runs backwards")
        if lo < 1 or hi > m:
            raise ValueError(f"--images {part.strip()!r}: image numbers must be 1..{m} for "
                             f"this model of {m} images (image 1 is the first)")
        out.extend(range(lo - 1, hi))
    if not out:
        raise ValueError(f"--images {text!r} names no image")
    return list(dict.fromkeys(out))


def run(args: argparse.Namespace) -> int:
    """Run an export described by parsed arguments.

    Parameters
    ----------
    args : argparse.Namespace
        As set by :func:`register`.

    Returns
    -------
    int
        0 done, 1 unreadable model / refused or failing destination, 2 invalid arguments,
        130 interrupted.
    """
    from modescope.core.output.atomic import DestinationError, refuse_sources
    from modescope.core.output.export import ExportOptions, plan_export, run_export
    from modescope.core.output.model_file import load_model

    err = sys.stderr
    try:
        d = load_model(args.model)
    except ModescopeError as exc:
        print(f"modescope export: {exc}", file=err)
        return EXIT_FAILED
    if args.rank is not None and not 1 <= args.rank <= d.rank:
        print(f"modescope export: --rank must be 1..{d.rank} (the model has {d.rank} basis "
              f"images), got {args.rank}", file=err)
        return EXIT_USAGE
    rank, rank_line = resolve_rank(args.rank, d)
    images = args.images
    if images not in ("all", "flagged"):
        try:
            images = parse_image_list(images, d)
        except ValueError as exc:
            print(f"modescope export: {exc}", file=err)
            return EXIT_USAGE
    out = Path(args.out)
    if not out.exists():
        try:
            out.mkdir(parents=True)
        except OSError as exc:
            print(f"modescope export: cannot create the folder {out}: "
                  f"{exc.strerror or exc}", file=err)
            return EXIT_FAILED
    try:
        options = ExportOptions(
            rank=rank, what=args.what, image_format=args.image_format,
            quality=args.quality, images=images, level=args.level, upsample=args.upsample,
            float16=args.float16, sheet_count=args.sheet_count, overwrite=args.overwrite,
            allow_source_folder=args.allow_source_folder)
        plan = plan_export(d, out, options)
        refuse_sources(plan.files, [args.model], what="the model file this command reads")
    except ModescopeError as exc:       # DestinationError included
        print(f"modescope export: {_cli_words(str(exc))}", file=err)
        return EXIT_FAILED
    except (TypeError, ValueError) as exc:
        print(f"modescope export: {exc}", file=err)
        return EXIT_USAGE
    print(rank_line, flush=True)
    progress = None if args.quiet else CountProgress(err, "export", "files")
    try:
        with InterruptFlag("export: stopping after the current file (Ctrl-C again to stop "
                           "now)") as interrupted:
            report = run_export(plan, progress=progress, cancel=interrupted)
    except DestinationError as exc:
        print(f"modescope export: {_cli_words(str(exc))}", file=err)
        return EXIT_FAILED
    except KeyboardInterrupt:
        print("\nmodescope export: interrupted; the files written so far are complete",
              file=err)
        return EXIT_INTERRUPTED
    print(report.summary())
    return EXIT_INTERRUPTED if report.cancelled else EXIT_OK


def _cli_words(message: str) -> str:
    """Name the command-line options in a core message instead of the Python parameters."""
    return (message.replace("(allow_source_folder=True)", "(--allow-source-folder)")
            .replace("allow overwriting", "pass --overwrite to replace them"))
