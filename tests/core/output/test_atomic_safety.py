"""core.output.atomic: a source is never a destination; stale temporary files of ours are
removed, nothing else is."""

from __future__ import annotations

import os
import subprocess
import sys
import time

import numpy as np
import pytest

from modescope.core.decomposition import Decomposition
from modescope.core.errors import ModelFileError
from modescope.core.output import atomic
from modescope.core.output.atomic import (DestinationError, atomic_write_bytes, refuse_sources,
                                          remove_stale_temps, temp_name)
from modescope.core.output.model_file import save_model


@pytest.fixture()
def src(tmp_path):
    folder = tmp_path / "src"
    folder.mkdir()
    for name in ("a.png", "b.png"):
        (folder / name).write_bytes(name.encode() * 10)
    return folder


def test_same_name_link_and_hard_link_are_refused(src, tmp_path):
    sources = [src / "a.png", src / "b.png", src / "gone.png"]
    with pytest.raises(DestinationError, match=r"refusing to write .*a\.png: it is a source"):
        refuse_sources(src / "a.png", sources)
    with pytest.raises(DestinationError, match="gone.png"):      # a missing source's name too
        refuse_sources(src / "gone.png", sources)
    link = tmp_path / "link.png"
    link.symlink_to(src / "b.png")
    with pytest.raises(DestinationError, match=r"the same file as .*b\.png"):
        refuse_sources(link, sources)
    hard = tmp_path / "hard.png"
    os.link(src / "a.png", hard)
    with pytest.raises(DestinationError) as info:
        refuse_sources([tmp_path / "new.png", hard], sources)
    assert info.value.path == hard
    # other spellings of a source's name
    with pytest.raises(DestinationError):
        refuse_sources(src / ".." / "src" / "a.png", sources)
    refuse_sources([tmp_path / "new.png", src / "c.png"], sources)    # new names pass
    refuse_sources(src / "a.png", [])


def test_the_writers_refuse_a_protected_file_whatever_overwrite_says(src):
    before = (src / "a.png").read_bytes()
    with pytest.raises(DestinationError, match="source image"):
        atomic_write_bytes(src / "a.png", b"new", overwrite=True, protect=[src / "a.png"])
    assert (src / "a.png").read_bytes() == before
    assert not [n for n in os.listdir(src) if atomic.is_temp_name(n)]
    d = Decomposition(mean=np.zeros(4, np.float32), basis=np.zeros((4, 0), np.float32),
                      singular_values=np.zeros(0), weights=np.zeros((0, 2)), total_energy=0.0,
                      image_shape=(2, 2, 1), paths=(str(src / "a.npz"), str(src / "b.png")))
    (src / "a.npz").write_bytes(b"an image named .npz")
    with pytest.raises(ModelFileError, match="source image"):
        save_model(src / "a.npz", d, overwrite=True)
    assert (src / "a.npz").read_bytes() == b"an image named .npz"


def _dead_pid() -> int:
    proc = subprocess.Popen([sys.executable, "-c", "pass"])
    proc.wait()
    return proc.pid


def test_stale_temporary_files_are_removed_and_only_ours(tmp_path):
    dead = temp_name(tmp_path / "m.npz", pid=_dead_pid())
    live = temp_name(tmp_path / "n.npz")                  # this process
    host = "0000" if atomic.temp_name("x").name.split("-")[1] != "0000" else "1111"
    other_host = tmp_path / f".p.npz.modescope-{host}-1-0123abcd.tmp"       # pid unknowable
    other_host_old = tmp_path / f".q.npz.modescope-{host}-1-0123abcd.tmp"
    foreign = [tmp_path / ".r.npz.1234abcd.tmp", tmp_path / "s.modescope-0000-1-0123abcd.tmp",
               tmp_path / "keep.png"]
    for p in (dead, live, other_host, other_host_old, *foreign):
        p.write_bytes(b"x")
    old = time.time() - atomic.STALE_SECONDS - 60
    os.utime(other_host_old, (old, old))
    os.utime(foreign[0], (old, old))
    assert atomic.is_temp_name(dead.name) and atomic.is_temp_name(live.name)
    removed = remove_stale_temps(tmp_path)
    assert sorted(removed) == sorted([dead, other_host_old])
    assert sorted(os.listdir(tmp_path)) == sorted(
        p.name for p in (live, other_host, *foreign))
    # an old file of this very process is stale too
    os.utime(live, (old, old))
    assert remove_stale_temps(tmp_path) == [live]


def test_the_first_write_into_a_folder_tidies_it(tmp_path):
    folder = tmp_path / "out"
    folder.mkdir()
    dead = temp_name(folder / "m.npz", pid=_dead_pid())
    dead.write_bytes(b"half a model")
    atomic_write_bytes(folder / "a.csv", b"1,2\n")
    assert sorted(os.listdir(folder)) == ["a.csv"]


def test_wrong_types_are_named():
    with pytest.raises(TypeError, match="target must be a path"):
        refuse_sources(5, [])
    with pytest.raises(TypeError, match="path must be a path"):
        atomic_write_bytes(5, b"x", protect=["a.png"])
