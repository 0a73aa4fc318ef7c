"""The freedesktop entry and the AppStream metadata in ``packaging/``.

The outside checks are the freedesktop reference validators: ``desktop-file-validate``
(Debian ``desktop-file-utils``) and ``appstreamcli validate`` (Debian ``appstream``); each test
skips, naming the missing tool, where it is not installed. The other tests read both files
with the standard library and compare them with the program (its id, its version, the image
types the scanner opens, the screenshots in ``packaging/screenshots``).
"""

from __future__ import annotations

import configparser
import mimetypes
import shutil
import subprocess
import xml.etree.ElementTree as ET
from importlib.metadata import version
from pathlib import Path

import pytest

from modescope.app.desktop.icon import APP_ID
from modescope.core.sources.scan import SUPPORTED_SUFFIXES

PACKAGING = Path(__file__).resolve().parents[2] / "packaging"
DESKTOP = PACKAGING / f"{APP_ID}.desktop"
METAINFO = PACKAGING / f"{APP_ID}.metainfo.xml"


def _tool(name: str, debian_package: str) -> str:
    path = shutil.which(name)
    if path is None:
        pytest.skip(f"{name} is not installed (Debian package {debian_package})")
    return path


def _entry() -> configparser.SectionProxy:
    parser = configparser.ConfigParser(interpolation=None, delimiters=("=",))
    parser.optionxform = str          # keys are case-sensitive in desktop entries
    parser.read(DESKTOP, encoding="utf-8")
    return parser["Desktop Entry"]


def _mime_of(suffix: str) -> str:
    guessed, _ = mimetypes.guess_type(f"x{suffix}")
    if guessed is None and suffix == ".webp":
        # older Pythons without a system mime.types do not know WebP; its registered type is
        # image/webp (IANA media types registry, RFC 9649, 2024)
        guessed = "image/webp"
    assert guessed is not None, suffix
    return guessed


# ----- the reference validators ------------------------------------------------------------------
def test_desktop_entry_passes_desktop_file_validate():
    tool = _tool("desktop-file-validate", "desktop-file-utils")
    done = subprocess.run([tool, str(DESKTOP)], capture_output=True, text=True, timeout=60)
    # it prints nothing and exits 0 for a valid file (hints would also be printed)
    assert (done.returncode, done.stdout.strip(), done.stderr.strip()) == (0, "", "")


def test_metainfo_passes_appstreamcli_validate():
    tool = _tool("appstreamcli", "appstream")
    done = subprocess.run([tool, "validate", "--no-net", str(METAINFO)], capture_output=True,
                          text=True, timeout=60)
    assert done.returncode == 0, done.stdout + done.stderr
    # no error or warning line. Info lines are allowed: AppStream 1.0 calls <developer_name>
    # deprecated (an info) while 0.16, Debian 12's, does not know its successor <developer>
    flagged = [line for line in done.stdout.splitlines() if line[:2] in ("E:", "W:")]
    assert flagged == []


# ----- the files agree with the program ----------------------------------------------------------
def test_desktop_entry_starts_the_command_with_our_icon():
    entry = _entry()
    assert entry["Type"] == "Application"
    assert entry["Exec"] == "modescope %F"       # folders and image files, as the command takes
    assert entry["Icon"] == APP_ID
    assert entry["Terminal"] == "false"


def test_desktop_entry_lists_every_image_type_the_scanner_opens():
    listed = [m for m in _entry()["MimeType"].split(";") if m]
    wanted = {_mime_of(s) for s in SUPPORTED_SUFFIXES}
    assert wanted == {"image/png", "image/jpeg", "image/tiff", "image/bmp", "image/webp"}
    assert set(listed) == wanted | {"inode/directory"}
    assert len(listed) == len(set(listed))


def test_metainfo_matches_the_entry_the_version_and_the_screenshots():
    root = ET.parse(METAINFO).getroot()
    assert root.tag == "component" and root.get("type") == "desktop-application"
    assert root.findtext("id") == APP_ID
    assert root.findtext("launchable") == DESKTOP.name
    assert root.findtext("project_license") == "MIT"
    assert root.findtext("provides/binary") == "modescope"
    media = {m.text for m in root.findall("provides/mediatype")}
    assert media == {m for m in _entry()["MimeType"].split(";") if m.startswith("image/")}
    assert root.find("releases/release").get("version") == version("modescope")
    description = " ".join(ET.tostring(root.find("description"), encoding="unicode").split())
    assert "singular value decomposition" in description
    assert "screening aid for a person to review" in description
    images = [i.text for i in root.findall("screenshots/screenshot/image")]
    assert len(images) == 3
    for url in images:
        assert url.startswith("https://")
        shot = PACKAGING / "screenshots" / url.rsplit("/", 1)[1]
        assert shot.is_file(), url


def test_the_icon_file_is_a_square_svg_named_in_the_entry():
    from modescope.app.desktop.icon import icon_path

    root = ET.parse(icon_path()).getroot()
    assert root.tag == "{http://www.w3.org/2000/svg}svg"
    assert root.get("viewBox") == "0 0 256 256"
    assert icon_path().parent.name == "resources"
