"""``modescope check MODEL.npz SOURCE...``: score new images against a frozen model (Phase II).

Exit codes: 0 the images were scored (flagged or not), 3 with ``--fail-on-flag`` when any image
is flagged, 1 unreadable or inconsistent input or a refused output file (the message goes to
stderr), 2 wrong usage, 130 interrupted (the images read so far are printed, nothing is
written). The model file is only read; the CSV and the maps never replace a source image or
the model file, whatever ``--overwrite`` says.
"""

from __future__ import annotations

import argparse
import os
import sys

from modescope.app.cli.common import (EXIT_INTERRUPTED, EXIT_OK, EXIT_UNUSABLE, InterruptFlag,
                                      ProgressLine, check_rank, error, failed, fmt, label,
                                      level, non_negative_int, print_problems, resolve_rank)
from modescope.app.cli.outliers import beyond_text, level_text
from modescope.app.cli.writing import check_output
from modescope.app.words import counted
from modescope.core.errors import ModescopeError
from modescope.core.output.model_file import load_model
from modescope.core.review.outliers import Q_METHOD_NAMES

__all__ = ["register", "run", "EXIT_FLAGGED", "CAUTION", "CSV_NOTE"]

#: Exit code with ``--fail-on-flag`` when at least one image is flagged.
EXIT_FLAGGED = 3

CAUTION = ("Caution: Phase II limits assume the reference images were normal and the process "
           "has not changed since; a flag asks a person to look at the image, it is not a "
           "verdict on a part, a sample or a person.")
CSV_NOTE = "flag 1 = beyond a limit, 0 = within both"


def register(subparsers) -> None:
    """Add the ``check`` verb to an argparse sub-parsers object."""
    p = subparsers.add_parser(
        "check", help="score new images against a saved model without changing it",
        description="Read new images (folders or files, as for analyze) with the model's own "
                    "colour, downscale and size, project them on the model's basis images and "
                    "score each with the residual statistic Q and Hotelling's T2 against Phase "
                    "II limits (T2: Tracy, Young and Mason 1992; Q: the model's own limit). An "
                    "image is flagged when score = max(Q/Q limit, T2/T2 limit) > 1. The model "
                    "file is not modified. Images of another size are named and skipped "
                    "unless --resize-mismatched is given. Without --rank, the default rank is "
                    "the smallest capturing 95 % of the energy.")
    p.add_argument("model", metavar="MODEL.npz", help="model file saved by modescope")
    p.add_argument("sources", nargs="+", metavar="SOURCE", help="folders or files of new images")
    p.add_argument("--rank", type=non_negative_int, default=None, metavar="K",
                   help="basis images kept (default: the smallest rank capturing 95 %% of "
                        "the energy, or all in the model when they capture less)")
    p.add_argument("--level", type=level, default=0.99,
                   help="confidence level of the limits, between 0 and 1 (default 0.99)")
    p.add_argument("--csv", default=None, metavar="FILE",
                   help="write one row per checked image: number, path, page, score, q, "
                        "q_limit, t2, t2_limit, flag (1/0)")
    p.add_argument("--maps", default=None, metavar="FOLDER",
                   help="write the residual maps of the flagged images, each image's T2 "
                        "contributions and the per-pixel spread maps into this folder")
    p.add_argument("--exact-spread", action="store_true",
                   help="with --maps: read the model's own images once more so that the "
                        "spread maps are exact (without it the energy beyond the model's modes "
                        "is spread evenly over the pixels)")
    p.add_argument("--fail-on-flag", action="store_true",
                   help=f"exit with code {EXIT_FLAGGED} when any image is flagged (for "
                        "scripts and pipelines)")
    p.add_argument("--overwrite", action="store_true",
                   help="replace the CSV or map files if they exist (a source image or the "
                        "model file is never replaced)")
    p.add_argument("--recursive", action="store_true", help="look into sub-folders")
    p.add_argument("--resize-mismatched", action="store_true",
                   help="resize images of another size to the model's size (as analyze does) "
                        "instead of skipping them")
    p.add_argument("--top", type=non_negative_int, default=20, metavar="N",
                   help="rows to print (default 20; 0 prints every image)")
    p.add_argument("--quiet", action="store_true", help="no progress display")
    p.set_defaults(func=run)


def _refused(args) -> bool:
    """Print why an output cannot be written (True), or return False when all can."""
    if args.csv is not None and not check_output("check", "--csv", args.csv,
                                                 overwrite=bool(args.overwrite),
                                                 sources=args.sources, inputs=[args.model]):
        return True
    if args.maps is not None and not os.path.isdir(args.maps):
        error("check", f"--maps {args.maps}: no such folder; create it first", EXIT_UNUSABLE)
        return True
    return False


def _score(args, d):
    from modescope.core.review.check import check_images
    progress = None if args.quiet else ProgressLine(sys.stderr)
    rank, rank_line = resolve_rank(args.rank, d)
    with InterruptFlag("modescope check: stopping after the current block; the images read "
                       "so far are shown, nothing is written (Ctrl-C again to stop at "
                       "once)") as stop:
        result = check_images(d, args.sources, rank=rank, level=args.level,
                              recursive=bool(args.recursive),
                              resize_mismatched=True if args.resize_mismatched else None,
                              progress=progress, cancel=stop)
    return result, rank_line


def _write(args, d, result) -> list[str]:
    from modescope.core.output.export_maps import write_check_maps
    from modescope.core.review.check import write_check_csv
    lines = []
    if args.csv is not None:
        path = write_check_csv(args.csv, result, overwrite=bool(args.overwrite),
                               protect=[args.model, *d.paths])
        lines.append(f"CSV written: {path} ({CSV_NOTE})")
    if args.maps is not None:
        files = write_check_maps(args.maps, d, result, spread=_spread(args, d, result.rank),
                                 overwrite=bool(args.overwrite),
                                 protect=[args.model, *args.sources])
        lines.append(f"Maps written: {counted(len(files), 'file')} in {args.maps} (maps.txt "
                     "says what each is)")
    return lines


def _spread(args, d, rank: int):
    """The spread maps from one pass over the model's images (None: from the model alone)."""
    if not args.exact_spread:
        return None
    from modescope.core.review.maps import pixel_energy_pass, pixel_spread
    energy, n_read, problems = pixel_energy_pass(d, progress=None if args.quiet else
                                                 ProgressLine(sys.stderr))
    if energy is None or n_read != d.n_images:
        print(f"modescope check: {d.n_images - n_read} of the model's images could not be read "
              "again; the spread maps are made from the model alone", file=sys.stderr)
        print_problems(problems)
        return None
    return pixel_spread(d, rank, energy)


def run(args: argparse.Namespace) -> int:
    """Score the new images (and write the CSV and maps when asked); return the exit code."""
    try:
        if _refused(args):
            return EXIT_UNUSABLE
        d = load_model(args.model)
        code = check_rank("check", args.rank, d)
        if code is not None:
            return code
        result, rank_line = _score(args, d)
        written = [] if result.cancelled else _write(args, d, result)
    except (ModescopeError, ValueError, MemoryError, OSError, KeyboardInterrupt) as exc:
        return failed("check", exc, unusable="nothing checked: ")
    _report(args, d, result, rank_line)
    for line in written:
        print(line)
    print_problems(result.problems)
    print(CAUTION)
    if result.cancelled:
        print(f"modescope check: interrupted; {counted(result.n_images, 'image')} scored, "
              "nothing written", file=sys.stderr)
        return EXIT_INTERRUPTED
    if args.fail_on_flag and result.n_flagged:
        return EXIT_FLAGGED
    return EXIT_OK


def _report(args, d, result, rank_line: str) -> None:
    lim = result.table.limits
    method_q = Q_METHOD_NAMES.get(lim.q_method, lim.q_method)
    n_images = counted(result.n_images, "new image")
    print(f"Model {args.model}: {counted(d.n_images, 'image')}, checked {n_images} at rank "
          f"{result.rank} of {d.rank}, level {level_text(result.level)}")
    print(rank_line)
    print(f"Q limit {fmt(lim.q_limit)} ({method_q}); T2 limit {fmt(lim.t2_limit)} (F, Phase "
          f"II, {counted(lim.t2_rank, 'mode')})")
    print(f"Q limit method: {lim.q_reason}.")
    print(f"Flagged: {result.n_flagged:,} of {n_images} "
          "(score = max(Q/Q limit, T2/T2 limit) > 1)")
    if lim.note:
        print(f"Note: {lim.note}")
    order = result.table.order
    shown = order if args.top == 0 else order[:args.top]
    _print_table(result, shown)
    print("(# = place, most unusual first; number = the image's number in the order checked, "
          "1-based, as in the CSV; beyond = the limits the image is beyond)")
    if len(shown) < len(order):
        print(f"({len(shown):,} of {counted(len(order), 'image')} shown; --top 0 shows all)")


def _print_table(result, shown) -> None:
    t = result.table
    header = ("#", "number", "path", "score", "q", "t2", "beyond")
    body = [(str(place + 1), str(i + 1), label(result.paths[i] or f"image {i + 1}",
                                               int(result.pages[i])),
             fmt(t.score[i]), fmt(t.q[i]), fmt(t.t2[i]), beyond_text(t.q_flag[i], t.t2_flag[i]))
            for place, i in enumerate(shown)]
    widths = [max(len(h), *(len(row[c]) for row in body)) if body else len(h)
              for c, h in enumerate(header)]
    for row in [header, *body]:
        cells = [cell.ljust(widths[c]) if c in (2, 6) else cell.rjust(widths[c])
                 for c, cell in enumerate(row)]
        print("  ".join(cells).rstrip())
