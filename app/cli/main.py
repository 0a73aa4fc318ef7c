"""The ``modescope`` command: one verb per module of this package, the desktop program otherwise.

``modescope`` with no arguments (or with folders / a model file and no verb) opens the desktop
program, imported only then; ``modescope analyze``, ``info`` and the other verbs work without a
display.

Exit codes: 0 done (perhaps with skipped files), 1 nothing usable or an input error, 2 usage,
130 interrupted.

Interruptions: this module imports only the standard library at its top, so a Ctrl-C at any
moment of the start-up (numpy, Pillow and the verbs are imported inside :func:`main`) ends with
exit code 130 and one line, never a traceback; importing it installs a ``sys.excepthook`` that
does the same for a Ctrl-C reaching the top level just before or after :func:`main` (not in an
interactive session). When run as the program (``argv`` None), SIGTERM
is handled like Ctrl-C, and once the verb has returned a further Ctrl-C or SIGTERM ends the
process at once with 130 (nothing is left to keep).
"""

from __future__ import annotations

import os
import signal
import sys

__all__ = ["VERBS", "VERB_NAMES", "build_parser", "main"]

EXIT_UNUSABLE, EXIT_USAGE, EXIT_INTERRUPTED = 1, 2, 130   # as in common.py (not imported here)

#: The verbs, in the order ``--help`` lists them; each is the module ``modescope.app.cli.<verb>``.
VERB_NAMES = ("analyze", "update", "info", "outliers", "duplicates", "frequencies", "export",
              "check", "demo")


def _interrupted_quietly(kind, value, traceback) -> None:
    """``sys.excepthook`` of the program: a Ctrl-C that reached the top level outside
    :func:`main` (between the import of this module and the call) ends with 130, no traceback."""
    if issubclass(kind, KeyboardInterrupt) and not (hasattr(sys, "ps1") or sys.flags.interactive):
        try:
            print("\nmodescope: interrupted", file=sys.stderr, flush=True)
            sys.stdout.flush()
        except (OSError, ValueError):  # pragma: no cover - streams closed
            pass
        os._exit(EXIT_INTERRUPTED)
    sys.__excepthook__(kind, value, traceback)


if sys.excepthook is sys.__excepthook__:     # leave a hook someone else installed alone
    sys.excepthook = _interrupted_quietly


def _load_verbs() -> dict:
    """Import every verb module explicitly (a broken one fails at start-up, never vanishes)."""
    from modescope.app.cli import analyze, demo, duplicates, export, info, outliers, update
    from modescope.app.cli import frequencies
    from modescope.app.cli import check
    return {"analyze": analyze, "update": update, "info": info, "outliers": outliers,
            "duplicates": duplicates, "frequencies": frequencies, "export": export,
            "check": check, "demo": demo}


def __getattr__(name: str):
    # VERBS (verb name -> module with ``register(subparsers)``) is made on first use, so that
    # importing this module stays cheap and a Ctrl-C during the heavy imports is caught by main
    if name == "VERBS":
        verbs = _load_verbs()
        globals()["VERBS"] = verbs
        return verbs
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")


def _version() -> str:
    from modescope.core.engine.pipeline import version
    return version()


def build_parser():
    """Return the argument parser with every verb registered."""
    from modescope.app.cli.common import Parser
    verbs = globals().get("VERBS") or __getattr__("VERBS")
    parser = Parser(prog="modescope",
                    description="Explore what a collection of aligned images is made of. "
                                "With no command (or with folders, image files or a model "
                                "file and no command) the desktop program opens.")
    parser.add_argument("--version", action="version", version=f"modescope {_version()}")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND", parser_class=Parser)
    for module in verbs.values():
        module.register(sub)
    return parser


def _sigterm_like_ctrl_c(signum, frame) -> None:
    """Handle SIGTERM as the SIGINT handler in force handles Ctrl-C."""
    handler = signal.getsignal(signal.SIGINT)
    if callable(handler):
        handler(signal.SIGINT, frame)
    else:                          # SIGINT ignored or left to the system: stop here
        raise KeyboardInterrupt


def _exit_at_once(signum, frame) -> None:  # pragma: no cover - runs in a subprocess only
    os._exit(EXIT_INTERRUPTED)


def _set_handlers(term, interrupt=None) -> None:
    try:
        signal.signal(signal.SIGTERM, term)
        if interrupt is not None:
            signal.signal(signal.SIGINT, interrupt)
    except (ValueError, OSError):  # pragma: no cover - not the main thread
        pass


def main(argv: list[str] | None = None) -> int:
    """Run the command line; with no verb, open the desktop program.

    Parameters
    ----------
    argv : list of str, optional
        Arguments after the program name; ``sys.argv[1:]`` (and the program's signal
        handling, see the module notes) when None.

    Returns
    -------
    int
        The exit code (0 done, 1 nothing usable, 2 usage, 130 interrupted).
    """
    program = argv is None
    argv = list(sys.argv[1:] if argv is None else argv)
    _printable_streams()
    if not argv or (argv[0] not in VERB_NAMES and not argv[0].startswith("-")):
        return _run_desktop(argv)
    verb = argv[0] if argv[0] in VERB_NAMES else ""
    if program:
        _set_handlers(_sigterm_like_ctrl_c)
    try:
        return _run_verb(argv)
    except KeyboardInterrupt:
        name = f"modescope {verb}" if verb else "modescope"
        try:
            print(f"\n{name}: interrupted", file=sys.stderr, flush=True)
        except (OSError, ValueError):  # pragma: no cover - stderr closed
            pass
        return EXIT_INTERRUPTED
    finally:
        if program:   # the work is over: a late Ctrl-C only ends the process, quietly
            _set_handlers(_exit_at_once, _exit_at_once)


def _printable_streams() -> None:
    """Let any file name reach the terminal: characters the terminal's encoding cannot show
    (names that are not valid UTF-8 arrive as lone surrogates) are written as backslash
    escapes instead of ending the command with UnicodeEncodeError."""
    for stream in (sys.stdout, sys.stderr):
        reconfigure = getattr(stream, "reconfigure", None)
        if reconfigure is not None:
            try:
                reconfigure(errors="backslashreplace")
            except (ValueError, OSError):  # pragma: no cover - a stream already in use
                pass


def _run_verb(argv: list[str]) -> int:
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
              f"{', '.join(VERB_NAMES)})", file=sys.stderr)
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
