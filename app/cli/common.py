"""Pieces shared by the command-line verbs: exit codes, the parser class, argument types, the
progress lines on stderr, a Ctrl-C that asks to stop instead of killing, how a failed or
stopped command is reported, and the entry point that runs one verb on its own."""

from __future__ import annotations

import argparse
import math
import signal
import sys
import threading
import time

from modescope.core.errors import ModescopeError

#: Exit codes of every verb (README): done, nothing usable, wrong usage, interrupted.
EXIT_OK, EXIT_UNUSABLE, EXIT_USAGE, EXIT_INTERRUPTED = 0, 1, 2, 130


class Parser(argparse.ArgumentParser):
    """argparse parser that exits with :data:`EXIT_USAGE` and the usage line on a usage error."""

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
        detail = f" ({p.detail})" if getattr(p, "detail", "") else ""
        text = (f"{p.stage:>5}: {p.done}/{p.total} images ({100 * frac:.0f}%), "
                f"{p.rate:.0f} images/s{left}{detail}")
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


def cores() -> int:
    """Return the number of cores this process may use (for the passes after learning)."""
    import os
    try:
        return max(1, len(os.sched_getaffinity(0)))
    except (AttributeError, OSError):       # not on Linux
        return max(1, os.cpu_count() or 1)


def _whole_number(minimum: int, wording: str):
    """Return an argparse type for whole numbers of at least ``minimum``."""
    def parse(text: str) -> int:
        try:
            value = int(text)
        except ValueError:
            raise argparse.ArgumentTypeError(f"expected a whole number, got {text!r}") from None
        if value < minimum:
            raise argparse.ArgumentTypeError(f"expected {wording}, got {value}")
        return value
    return parse


def _number(accept, wording: str):
    """Return an argparse type for numbers for which ``accept(value)`` is True."""
    def parse(text: str) -> float:
        try:
            value = float(text)
        except ValueError:
            raise argparse.ArgumentTypeError(f"expected a number, got {text!r}") from None
        if not accept(value):
            raise argparse.ArgumentTypeError(f"expected {wording}, got {text}")
        return value
    return parse


#: argparse types of the verbs' options (each message says what was expected and what was found)
positive_int = _whole_number(1, "a number of at least 1")
non_negative_int = _whole_number(0, "a number >= 0")
fraction = _number(lambda v: 0.0 < v < 1.0, "a number strictly between 0 and 1")
level = _number(lambda v: 0.0 < v < 1.0, "a confidence level strictly between 0 and 1")
tolerance = _number(lambda v: math.isfinite(v) and v >= 0, "a finite number >= 0")


def add_accuracy_options(parser: argparse.ArgumentParser) -> None:
    """Add ``--oversample``, ``--tolerance`` and ``--max-passes`` (analyze and update)."""
    from modescope.core.engine.options import AnalysisOptions
    defaults = AnalysisOptions()
    parser.add_argument("--oversample", type=non_negative_int, default=defaults.oversample,
                        metavar="P", help="extra internal directions beyond --rank "
                                          f"(default {defaults.oversample})")
    parser.add_argument("--tolerance", type=fraction, default=defaults.tolerance, metavar="T",
                        help="relative accuracy asked of every singular value; refinement "
                             "passes run until each certified bound is within it "
                             f"(default {defaults.tolerance:g})")
    parser.add_argument("--max-passes", type=positive_int, default=defaults.max_passes,
                        metavar="N", help="most passes over the images after learning "
                                          f"(default {defaults.max_passes})")


def fmt(value: float) -> str:
    if math.isinf(value):
        return "inf"
    return f"{value:.4g}"


def label(path: str, page: int) -> str:
    return f"{path} [page {page}]" if page else path


def error(command: str, message: str, code: int) -> int:
    print(f"modescope {command}: error: {message}", file=sys.stderr)
    return code


def check_rank(command: str, rank, decomposition) -> int | None:
    if rank is not None and rank > decomposition.rank:
        print(f"modescope {command}: error: --rank must be at most {decomposition.rank} (the "
              f"model has {decomposition.rank} basis images), got {rank}", file=sys.stderr)
        return EXIT_USAGE
    return None


def resolve_rank(rank, decomposition) -> tuple[int, str]:
    """Return the rank a verb uses and the line that says so.

    Parameters
    ----------
    rank : int or None
        The ``--rank`` given (already checked against the model), or None for the default.
    decomposition : Decomposition

    Returns
    -------
    (int, str)
        The rank and one line such as "Rank 3 of 20: the smallest rank capturing 95 % of the
        energy (3 modes capture 96.6 %); --rank K sets another" or "Rank 5 of 20: given by
        --rank".
    """
    from modescope.core.review.rank import default_rank
    k = decomposition.rank
    if rank is not None:
        return rank, f"Rank {rank} of {k}: given by --rank"
    chosen, reason = default_rank(decomposition)
    return chosen, f"Rank {chosen} of {k}: {reason}; --rank K sets another"


def failed(command: str, exc: BaseException, unusable: str = "", memory_hint: str = "") -> int:
    """Print why ``modescope COMMAND`` stopped and return its exit code (nothing was written)."""
    if isinstance(exc, KeyboardInterrupt):
        print(f"\nmodescope {command}: interrupted; nothing written", file=sys.stderr)
        return EXIT_INTERRUPTED
    if isinstance(exc, MemoryError):
        print(f"modescope {command}: not enough memory{memory_hint}", file=sys.stderr)
    elif isinstance(exc, ModescopeError):
        print(f"modescope {command}: {unusable}{exc}", file=sys.stderr)
    else:
        print(f"modescope {command}: {exc}", file=sys.stderr)
    return EXIT_UNUSABLE


def print_problems(problems, notes=()) -> None:
    """Print the skipped files with their reasons, then notes on files that were used."""
    if problems:
        print(f"{len(problems)} file(s) skipped:", file=sys.stderr)
        for p in problems:
            print(f"  {p}", file=sys.stderr)
    if notes:
        print(f"{len(notes)} note(s) on files that were analysed:", file=sys.stderr)
        for note in notes:
            print(f"  {note}", file=sys.stderr)


class CountProgress:
    """Write ``"<prefix>: done/total <unit>"``: redrawn in place at most every 0.1 s on a
    terminal, one line per tenth otherwise (logs and pipes stay short).

    Parameters
    ----------
    stream : text stream
    prefix : str
        Command name, e.g. "export".
    unit : str
        What is counted, e.g. "files".
    """

    def __init__(self, stream, prefix: str, unit: str) -> None:
        self.stream = stream
        self.prefix = prefix
        self.unit = unit
        self.tty = bool(getattr(stream, "isatty", lambda: False)())
        self.last_time = 0.0
        self.last_tenth = -1

    def __call__(self, done: int, total: int) -> None:
        text = f"{self.prefix}: {done}/{total} {self.unit}"
        if self.tty:
            now = time.monotonic()
            if done == total or now - self.last_time >= 0.1:
                self.last_time = now
                end = "\n" if done == total else ""
                print("\r" + text, end=end, file=self.stream, flush=True)
        else:
            tenth = done * 10 // total if total else 10
            if tenth != self.last_tenth:
                self.last_tenth = tenth
                print(text, file=self.stream, flush=True)


class InterruptFlag:
    """Turn the first Ctrl-C into a stop request that long work checks between steps.

    Use as a context manager (main thread only; elsewhere it never fires). The instance is the
    ``cancel`` callable: it returns True once Ctrl-C was pressed. A second Ctrl-C raises
    KeyboardInterrupt at once.

    Parameters
    ----------
    message : str
        Printed on stderr at the first Ctrl-C (what will happen now).
    """

    def __init__(self, message: str) -> None:
        self.message = message
        self.set = False
        self._old = None

    def __call__(self) -> bool:
        return self.set

    def __enter__(self) -> "InterruptFlag":
        if threading.current_thread() is threading.main_thread():
            self._old = signal.signal(signal.SIGINT, self._handle)
        return self

    def _handle(self, signum, frame) -> None:
        if self.set:                       # second Ctrl-C: stop at once
            raise KeyboardInterrupt
        self.set = True
        print("\n" + self.message, file=sys.stderr, flush=True)

    def __exit__(self, *exc) -> bool:
        if self._old is not None:
            signal.signal(signal.SIGINT, self._old)
        return False
