"""A count progress line for the command line (``done/total`` of files or frames) on stderr."""

from __future__ import annotations

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
