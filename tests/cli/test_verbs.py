"""The command line's verbs: every module registers its verb, nothing is dropped silently."""

from __future__ import annotations

import subprocess
import sys

import pytest

from modescope.app.cli import main as cli_main

EXPECTED = ["analyze", "update", "info", "outliers", "duplicates", "frequencies", "export",
            "check", "demo"]


def test_every_verb_is_registered_and_listed_in_help(capsys):
    assert list(cli_main.VERBS) == EXPECTED
    parser = cli_main.build_parser()
    with pytest.raises(SystemExit) as info:
        parser.parse_args(["--help"])
    assert info.value.code == 0
    out = capsys.readouterr().out
    for verb in EXPECTED:
        assert verb in out
    assert "desktop program opens" in " ".join(out.split())
    for verb in EXPECTED:  # each verb parses its own --help
        with pytest.raises(SystemExit) as info:
            parser.parse_args([verb, "--help"])
        assert info.value.code == 0
        assert f"modescope {verb}" in capsys.readouterr().out


def test_a_broken_verb_fails_loudly(monkeypatch):
    def broken(subparsers):
        raise RuntimeError("verb module broken")

    monkeypatch.setattr(cli_main.VERBS["info"], "register", broken)
    with pytest.raises(RuntimeError, match="verb module broken"):
        cli_main.build_parser()


def test_a_verb_module_that_cannot_import_stops_the_command():
    # a verb whose module fails to import must not vanish from the command: the whole
    # command line fails at start-up with the import error
    code = ("import sys, types, builtins\n"
            "real = builtins.__import__\n"
            "def fake(name, *a, **k):\n"
            "    if name == 'modescope.app.cli' and a and a[2] and 'demo' in a[2]:\n"
            "        raise ImportError('demo verb broken')\n"
            "    return real(name, *a, **k)\n"
            "builtins.__import__ = fake\n"
            "from modescope.app.cli.main import main\n"
            "sys.exit(main(['info', '--help']))\n")
    done = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True)
    assert done.returncode != 0
    assert "demo verb broken" in done.stderr


def test_version_and_unknown_path(capsys):
    with pytest.raises(SystemExit) as info:
        cli_main.main(["--version"])
    assert info.value.code == 0
    assert capsys.readouterr().out.startswith("modescope ")
    assert cli_main.main(["/no/such/folder"]) == 2
    err = capsys.readouterr().err
    assert "/no/such/folder: no such file or folder" in err and "analyze" in err
