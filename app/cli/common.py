"""Small pieces shared by the command-line modules: a count progress line on stderr, a Ctrl-C
that asks to stop instead of killing, and the entry point that runs one sub-command on its own."""

from __future__ import annotations

import argparse
import signal
import sys
import threading
import time




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


def run_subcommand(name: str, register, argv=None) -> int:
    """Run the sub-command ``name`` on its own (``python -m modescope.app.cli.<name> ...``).

    Parameters
    ----------
    name : str
        The sub-command, e.g. "export".
    register : callable
        Adds the sub-command's parser to an argparse sub-parsers object.
    argv : list of str, optional
        Arguments after the program name; ``sys.argv[1:]`` when None.

    Returns
    -------
    int
        The sub-command's exit code (argparse itself exits with 2 on bad syntax).
    """
    parser = argparse.ArgumentParser(prog="modescope")
    sub = parser.add_subparsers(dest="command", required=True)
    register(sub)
    args = parser.parse_args([name, *(sys.argv[1:] if argv is None else argv)])
    return args.func(args)


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
