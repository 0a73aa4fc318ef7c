"""Command line of Modescope.

``modescope`` with no arguments (or with folders / a model file and no sub-command) opens the
desktop program; ``modescope analyze``, ``info`` and the other sub-commands work without a display.

Exit codes: 0 done (perhaps with skipped files), 1 nothing usable or an input error, 2 usage.
"""

from __future__ import annotations

import argparse
import importlib
import os
import sys
import time
from pathlib import Path

from modescope.app.cli.common import InterruptFlag
from modescope.app.words import counted
from modescope.core.errors import ModescopeError

EXIT_OK, EXIT_UNUSABLE, EXIT_USAGE = 0, 1, 2
_EXTRA_COMMANDS = ("outliers", "export", "demo")


class _Parser(argparse.ArgumentParser):
    def error(self, message):  # argparse exits 2 on usage errors; keep that, with a hint
        self.print_usage(sys.stderr)
        self.exit(EXIT_USAGE, f"{self.prog}: error: {message}\n")


class ProgressLine:
    """Write progress of an analysis to a stream: one rewritten line on a terminal, a line per
    ~10% otherwise."""

    def __init__(self, stream=None):
        self.stream = stream or sys.stderr
        self.tty = hasattr(self.stream, "isatty") and self.stream.isatty()
        self.last_stage, self.last_tenth, self.last_time = None, -1, 0.0

    def __call__(self, p) -> None:
        now = time.perf_counter()
        frac = p.done / p.total if p.total else 1.0
        left = "" if p.seconds_left is None else f", about {p.seconds_left:.0f} s left"
        text = (f"{p.stage:>5}: {p.done}/{p.total} images ({100 * frac:.0f}%), "
                f"{p.rate:.0f} images/s{left}")
        if self.tty:
            if now - self.last_time > 0.1 or p.done == p.total:
                self.stream.write("\r" + text.ljust(78))
                if p.done == p.total:
                    self.stream.write("\n")
                self.stream.flush()
                self.last_time = now
        else:
            tenth = int(frac * 10)
            if p.stage != self.last_stage or tenth > self.last_tenth:
                self.stream.write(text + "\n")
                self.stream.flush()
        if p.stage != self.last_stage:
            self.last_tenth = -1
        self.last_stage = p.stage
        self.last_tenth = max(self.last_tenth, int(frac * 10))


def _positive_int(text: str) -> int:
    try:
        value = int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected a whole number, got {text!r}") from None
    if value < 1:
        raise argparse.ArgumentTypeError(f"expected a number of at least 1, got {value}")
    return value


def build_parser() -> argparse.ArgumentParser:
    """Return the argument parser with every sub-command registered."""
    parser = _Parser(prog="modescope",
                     description="Explore what a collection of aligned images is made of.")
    parser.add_argument("--version", action="version", version=f"modescope {_version()}")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND", parser_class=_Parser)

    a = sub.add_parser("analyze", help="analyse folders/files of images into a model file",
                       description="Stream images through a mean-centred truncated SVD and "
                                   "write the model file.")
    a.add_argument("sources", nargs="+", metavar="SOURCE", help="folders or image files")
    a.add_argument("-o", "--output", required=True, metavar="MODEL.npz", help="model file to write")
    a.add_argument("--rank", type=_positive_int, default=20, metavar="K",
                   help="number of basis images (default 20)")
    a.add_argument("--color", choices=("gray", "rgb"), default="gray",
                   help="analyse luma (gray, default) or three channels (rgb)")
    a.add_argument("--downscale", type=_positive_int, default=1, metavar="F",
                   help="average F x F pixel blocks before analysis (default 1)")
    a.add_argument("--recursive", action="store_true", help="look into sub-folders")
    a.add_argument("--resize-mismatched", action="store_true",
                   help="resize images of another size to the most common size instead of "
                        "skipping them")
    a.add_argument("--block-size", type=_positive_int, default=128, metavar="B",
                   help="images per streaming update (default 128)")
    a.add_argument("--oversample", type=int, default=10, metavar="P",
                   help="extra internal directions (default 10)")
    a.add_argument("--no-refine", action="store_true",
                   help="skip the Rayleigh-Ritz step of the scoring pass")
    a.add_argument("--workers", type=int, default=0,
                   help="decoding threads (default 0: chosen from the image size)")
    a.add_argument("--quiet", action="store_true", help="no progress display")
    a.set_defaults(func=cmd_analyze)

    u = sub.add_parser("update", help="add more images to a model file",
                       description="Stream new images into an existing analysis, then score old "
                                   "and new images exactly.")
    u.add_argument("model", metavar="MODEL.npz")
    u.add_argument("sources", nargs="+", metavar="SOURCE", help="folders or files with new images")
    u.add_argument("-o", "--output", required=True, metavar="OUT.npz",
                   help="model file to write (may be MODEL.npz itself)")
    u.add_argument("--recursive", action="store_true", help="look into sub-folders")
    u.add_argument("--quiet", action="store_true", help="no progress display")
    u.set_defaults(func=cmd_update)

    i = sub.add_parser("info", help="summarise a model file")
    i.add_argument("model", metavar="MODEL.npz")
    i.add_argument("--ranks", type=_positive_int, default=10, metavar="N",
                   help="list the energy captured at the first N ranks (default 10)")
    i.set_defaults(func=cmd_info)

    for name in _EXTRA_COMMANDS:
        module = importlib.import_module(f"{__package__}.{name}")
        module.register(sub)
    return parser


def _version() -> str:
    from modescope.core.engine.pipeline import version
    return version()


def cmd_analyze(args) -> int:
    from modescope.core.output.model_file import save_model
    from modescope.core.engine.pipeline import AnalysisOptions, analyze
    try:
        options = AnalysisOptions(rank=args.rank, color=args.color, downscale=args.downscale,
                                  recursive=args.recursive,
                                  resize_mismatched=args.resize_mismatched,
                                  block_size=args.block_size, oversample=args.oversample,
                                  refine=not args.no_refine, workers=args.workers)
    except (TypeError, ValueError) as exc:
        print(f"modescope analyze: {exc}", file=sys.stderr)
        return EXIT_USAGE
    output = Path(args.output)
    if output.exists() and output.is_dir():
        print(f"modescope analyze: {output}: is a folder; give a file name such as "
              f"{output / 'model.npz'}", file=sys.stderr)
        return EXIT_USAGE
    start = time.perf_counter()
    progress = None if args.quiet else ProgressLine(sys.stderr)
    stop = InterruptFlag("modescope analyze: stopping after the current block; the images "
                         "analysed so far will be written (Ctrl-C again to stop at once and "
                         "write nothing)")
    try:
        with stop:
            result = analyze(args.sources, options, progress=progress, cancel=stop)
    except (ModescopeError, MemoryError, OSError, KeyboardInterrupt) as exc:
        return _failed("analyze", exc, unusable="nothing usable: ",
                       memory_hint="; try --downscale 2 (or more) or a smaller --block-size")
    d = result.decomposition
    if result.cancelled and d is None:
        print("modescope analyze: interrupted before any image was analysed; nothing written",
              file=sys.stderr)
        return 130
    try:
        written = save_model(output, d)
    except ModescopeError as exc:
        print(f"modescope analyze: {exc}", file=sys.stderr)
        return EXIT_UNUSABLE
    if result.cancelled:
        print(f"modescope analyze: interrupted; wrote the streaming result of the first "
              f"{counted(d.n_images, 'image')} to {written} (not exact: run `modescope update "
              f"{written} SOURCE...` to add the rest and get the exact scoring pass)",
              file=sys.stderr)
        _print_problems(result.problems)
        return 130
    elapsed = time.perf_counter() - start
    rows, cols, ch = d.image_shape
    cum = d.cumulative_energy()
    if d.rank:
        captured = f"rank {d.rank} captures {100 * cum[-1]:.1f}% of the energy"
    else:
        captured = ("no basis images: the images do not vary (each one equals the mean image"
                    + (", as a single image always does)" if d.n_images == 1 else ")"))
    print(f"analysed {counted(d.n_images, 'image')} of {rows}x{cols} "
          f"({'gray' if ch == 1 else 'rgb'}) in {elapsed:.1f} s; {captured}", file=sys.stderr)
    print(f"wrote {written}", file=sys.stderr)
    _print_problems(result.problems)
    return EXIT_OK


def cmd_update(args) -> int:
    import dataclasses
    from modescope.core.output.model_file import load_model, save_model
    from modescope.core.engine.pipeline import AnalysisOptions, update_analysis
    try:
        d = load_model(args.model)
        options = AnalysisOptions.from_dict(d.metadata.get("options", {}))
        options = dataclasses.replace(options, rank=max(d.rank, 1), recursive=args.recursive)
        progress = None if args.quiet else ProgressLine(sys.stderr)
        result = update_analysis(d, args.sources, options, progress=progress)
        written = save_model(args.output, result.decomposition)
    except (ModescopeError, MemoryError, OSError, KeyboardInterrupt) as exc:
        return _failed("update", exc)
    new = result.decomposition
    print(f"added {new.n_images - d.n_images} images to {d.n_images}; "
          f"{'exact scoring pass done' if new.exact else 'streaming update only'}",
          file=sys.stderr)
    print(f"wrote {written}", file=sys.stderr)
    _print_problems(result.problems)
    return EXIT_OK


def _failed(command: str, exc: BaseException, unusable: str = "", memory_hint: str = "") -> int:
    """Print why ``modescope COMMAND`` stopped and return its exit code (nothing was written)."""
    if isinstance(exc, KeyboardInterrupt):
        print(f"\nmodescope {command}: interrupted; nothing written", file=sys.stderr)
        return 130
    if isinstance(exc, MemoryError):
        print(f"modescope {command}: not enough memory{memory_hint}", file=sys.stderr)
    elif isinstance(exc, ModescopeError):
        print(f"modescope {command}: {unusable}{exc}", file=sys.stderr)
    else:
        print(f"modescope {command}: {exc}", file=sys.stderr)
    return EXIT_UNUSABLE


def _print_problems(problems) -> None:
    if not problems:
        return
    print(f"{len(problems)} file(s) skipped:", file=sys.stderr)
    for p in problems:
        print(f"  {p}", file=sys.stderr)


def cmd_info(args) -> int:
    from modescope.core.output.model_file import load_model
    from modescope.core.review.rank import energy_rank, gavish_donoho
    try:
        d = load_model(args.model)
    except ModescopeError as exc:
        print(f"modescope info: {exc}", file=sys.stderr)
        return EXIT_UNUSABLE
    rows, cols, ch = d.image_shape
    meta = d.metadata
    print(f"model:        {args.model}")
    print(f"images:       {d.n_images}")
    print(f"image size:   {rows} rows x {cols} cols, {'gray' if ch == 1 else 'rgb'} "
          f"({d.n_pixels} values per image)")
    if meta.get("downscale", 1) != 1:
        src = meta.get("source_size", ["?", "?"])
        print(f"source size:  {src[0]} x {src[1]} (downscaled by {meta['downscale']})")
    print(f"rank:         {d.rank}")
    print(f"state:        {'exact scoring pass done' if d.exact else 'streaming snapshot'}"
          f"{' (cancelled run)' if meta.get('stage') == 'cancelled' else ''}")
    if meta.get("created"):
        print(f"created:      {meta['created']}")
    print(f"energy:       total {d.total_energy:.6g}")
    shares, cum = d.energy_shares(), d.cumulative_energy()
    if not d.rank:
        print("basis images: none (the images do not vary: each one equals the mean image)")
    else:
        print("  rank  singular value   share   cumulative")
    for r in range(min(args.ranks, d.rank)):
        print(f"  {r + 1:4d}  {d.singular_values[r]:14.6g}  {100 * shares[r]:6.2f}%  "
              f"{100 * cum[r]:9.2f}%")
    if d.rank:
        print(f"suggested rank: {energy_rank(d, 0.9)} for 90% of the energy", end="")
        gd = gavish_donoho(d)
        print(f"; {gd.rank} by the Gavish-Donoho hard threshold" if gd.rank is not None
              else f"; Gavish-Donoho: not applicable ({gd.note})")
    problems = meta.get("problems", [])
    if problems:
        print(f"skipped files: {len(problems)} (first: {problems[0]['path']}: "
              f"{problems[0]['reason']})")
    return EXIT_OK


def main(argv: list[str] | None = None) -> int:
    """Run the command line; with no sub-command, open the desktop program."""
    argv = list(sys.argv[1:] if argv is None else argv)
    parser = build_parser()
    commands = set(parser._subparsers._group_actions[0].choices) if parser._subparsers else set()
    if not argv or (argv[0] not in commands and not argv[0].startswith("-")):
        return _run_gui(argv)
    args = parser.parse_args(argv)
    if not getattr(args, "func", None):
        parser.print_help(sys.stderr)
        return EXIT_USAGE
    try:
        return int(args.func(args) or 0)
    except BrokenPipeError:
        # the reader went away (``modescope info m.npz | head``): stop quietly, as the Python
        # documentation recommends (point stdout at devnull so the exit flush cannot fail)
        try:
            devnull = os.open(os.devnull, os.O_WRONLY)
            os.dup2(devnull, sys.stdout.fileno())
        except (OSError, ValueError):  # pragma: no cover - stdout without a file descriptor
            pass
        return EXIT_UNUSABLE


def _run_gui(paths: list[str]) -> int:
    missing = [p for p in paths if not os.path.exists(p)]
    if missing:
        print(f"modescope: {missing[0]}: no such file or folder (sub-commands: analyze, update, "
              f"info, outliers, duplicates, export, demo)", file=sys.stderr)
        return EXIT_USAGE
    try:
        from modescope.app.desktop.launch import run_gui
    except ImportError as exc:
        print(f"modescope: the desktop program cannot start ({exc}); the command-line "
              f"sub-commands still work (modescope --help)", file=sys.stderr)
        return EXIT_UNUSABLE
    return int(run_gui(paths) or 0)


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
