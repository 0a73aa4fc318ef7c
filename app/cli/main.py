"""The ``modescope`` command: one verb per module of this package, the desktop program otherwise.

``modescope`` with no arguments (or with folders / a model file and no verb) opens the desktop
program, imported only then; ``modescope analyze``, ``info`` and the other verbs work without a
display.

Exit codes: 0 done (perhaps with skipped files), 1 nothing usable or an input error, 2 usage,
130 interrupted.
"""

from __future__ import annotations

import argparse
import os
import sys

from modescope.app.cli import (analyze, demo, duplicates, export, info, outliers,  # noqa: F401
                               update)
from modescope.app.cli.common import EXIT_UNUSABLE, EXIT_USAGE, Parser

__all__ = ["VERBS", "build_parser", "main"]

#: Verb name -> module with ``register(subparsers)``; imported above, so a broken verb module
#: fails at start-up (and in the tests) instead of silently leaving its verb out.
VERBS = {"analyze": analyze, "update": update, "info": info, "outliers": outliers,
         "duplicates": duplicates, "export": export, "demo": demo}


def _version() -> str:
    from modescope.core.engine.pipeline import version
    return version()


def build_parser() -> argparse.ArgumentParser:
    """Return the argument parser with every verb registered."""
    parser = Parser(prog="modescope",
                    description="Explore what a collection of aligned images is made of. "
                                "With no command (or with folders, image files or a model "
                                "file and no command) the desktop program opens.")
    parser.add_argument("--version", action="version", version=f"modescope {_version()}")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND", parser_class=Parser)
    for module in VERBS.values():
        module.register(sub)
    return parser


def main(argv: list[str] | None = None) -> int:
    """Run the command line; with no verb, open the desktop program."""
    argv = list(sys.argv[1:] if argv is None else argv)
    if not argv or (argv[0] not in VERBS and not argv[0].startswith("-")):
        return _run_desktop(argv)
    parser = build_parser()
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


def _run_desktop(paths: list[str]) -> int:
    missing = [p for p in paths if not os.path.exists(p)]
    if missing:
        print(f"modescope: {missing[0]}: no such file or folder (commands: "
              f"{', '.join(VERBS)})", file=sys.stderr)
        return EXIT_USAGE
    try:
        from modescope.app.desktop.launch import run_gui
    except ImportError as exc:
        print(f"modescope: the desktop program cannot start ({exc}); the command-line "
              f"verbs still work (modescope --help)", file=sys.stderr)
        return EXIT_UNUSABLE
    return int(run_gui(paths) or 0)


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
