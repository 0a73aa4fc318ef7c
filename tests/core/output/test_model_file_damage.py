"""Damaged, hand-edited and hostile model files: one clear error naming the file and the
problem, checked before anything large is allocated, in the core and in every command.

Every bad file is made here from a good one written by save_model (members rewritten with
zipfile); nothing binary is committed.
"""

import io
import json
import os
import threading
import tracemalloc
import zipfile

import numpy as np
import pytest
from numpy.lib import format as npy_format

from modescope.app.cli.main import main as cli_main
from modescope.core.decomposition import Decomposition
from modescope.core.errors import ModelFileError, ModescopeError
from modescope.core.output import model_zip
from modescope.core.output.model_file import load_model, save_model

N, SHAPE, K = 12, (4, 5, 1), 3


def good_metadata():
    """Metadata with every field the analysis pipeline writes (core.engine.options.metadata_for
    plus the refinement summary and updated_from)."""
    return {
        "format": "modescope-model", "format_version": 1, "created": "2026-12-03T07:00:00+00:00",
        "versions": {"modescope": "0.1", "numpy": np.__version__, "scipy": "1.14"},
        "options": {"rank": K, "color": "gray", "downscale": 1, "tolerance": 1e-4},
        "source_size": [4, 5], "color": "gray", "downscale": 1, "resize_mismatched": False,
        "internal_directions": 23, "stage": "exact",
        "problems": [{"path": "/data/broken.png", "page": None, "reason": "cannot be decoded"},
                     {"path": "/data/multi.tif", "page": 2, "reason": "size differs"}],
        "refinement": {"passes": 1, "tolerance": 1e-4, "max_passes": 4, "certified": True,
                       "interrupted": False, "converged_modes": 2, "unconverged": [3]},
        "updated_from": {"images": 10, "created": None},
    }


def make_good(tmp_path):
    # built from LAPACK (numpy.linalg.svd) of a small centred matrix
    rng = np.random.default_rng(1)
    x = rng.random((int(np.prod(SHAPE)), N))
    mean = x.mean(axis=1)
    c = x - mean[:, None]
    u, s, _ = np.linalg.svd(c, full_matrices=False)
    w = u[:, :K].T @ c
    d = Decomposition(mean=mean.astype(np.float32), basis=u[:, :K].astype(np.float32),
                      singular_values=s[:K], weights=w, total_energy=float(np.sum(c ** 2)),
                      image_shape=SHAPE, paths=tuple(f"/data/f{i}.png" for i in range(N)),
                      residual=np.sum((c - u[:, :K] @ w) ** 2, axis=0), exact=True,
                      singular_value_error=np.full(K, 1e-9), metadata=good_metadata())
    return save_model(tmp_path / "good.npz", d)


def npy_bytes(array=None, header=None, data=b""):
    """Return a .npy member: of ``array``, or a ``header`` dict followed by raw ``data``."""
    buf = io.BytesIO()
    if array is not None:
        np.save(buf, array, allow_pickle=True)
    else:
        npy_format.write_array_header_1_0(buf, header)
        buf.write(data)
    return buf.getvalue()


def rewrite(good, path, replace=None, compress=None):
    """Copy ``good`` to ``path`` with members replaced: ``replace`` maps a member name to its
    bytes or to a callable that writes it into an open zip member."""
    replace = replace or {}
    with zipfile.ZipFile(good) as src, zipfile.ZipFile(path, "w") as dst:
        for name in src.namelist():
            content = replace.get(name, src.read(name))
            if callable(content):
                info = zipfile.ZipInfo(name)
                info.compress_type = zipfile.ZIP_DEFLATED
                with dst.open(info, "w", force_zip64=True) as fh:
                    content(fh)
            else:
                dst.writestr(name, content, compress_type=compress or zipfile.ZIP_STORED)
    return path


def with_metadata(good, path, **changes):
    meta = good_metadata()
    meta.update(changes)
    return rewrite(good, path, {"metadata.npy": npy_bytes(np.asarray(json.dumps(meta)))})


def zeros_member(shape, dtype):
    """A member that declares ``shape`` and holds that many zero bytes (inflated by zip)."""
    header = {"descr": np.dtype(dtype).str, "fortran_order": False, "shape": shape}

    def write(fh):
        fh.write(npy_bytes(header=header))
        left = int(np.prod(shape)) * np.dtype(dtype).itemsize
        chunk = bytes(8 << 20)
        while left:
            fh.write(chunk[:min(left, len(chunk))])
            left -= min(left, len(chunk))
    return write


# ----- the cases: (file maker, words the message must hold) -----------------------------------

META_CASES = {
    "options not an object": (dict(options="fast"),
                              "metadata field 'options' must be a JSON object, found str 'fast'"),
    "option of wrong type": (dict(options={"rank": "many"}),
                             "'options' does not hold usable analysis options \\(rank must be "
                             "an integer, got str 'many'\\)"),
    "option out of range": (dict(options={"tolerance": 5}),
                            "'options' .*tolerance must be between 0 and 1"),
    "format version text": (dict(format_version="one"),
                            "'format_version' must be an integer of at least 1, found str"),
    "newer format": (dict(format_version=7), "written by a newer Modescope \\(format version 7"),
    "foreign format": (dict(format="other"), "metadata says format 'other'"),
    "source size": (dict(source_size=[10]),
                    "'source_size' must be \\[rows, cols\\], two positive integers, found "
                    "list \\[10\\]"),
    "downscale text": (dict(downscale="2"),
                       "'downscale' must be an integer of at least 1, found str '2'"),
    "downscale float": (dict(downscale=2.5), "'downscale' must be an integer"),
    "resize flag": (dict(resize_mismatched="yes"), "'resize_mismatched' must be true or false"),
    "stage number": (dict(stage=5), "'stage' must be text, found int 5"),
    "created number": (dict(created=20261203), "'created' must be text, found int"),
    "versions": (dict(versions={"numpy": 2}), "'versions.numpy' must be text, found int 2"),
    "problems text": (dict(problems="none"), "'problems' must be a list of"),
    "problem not object": (dict(problems=["a.png"]), "'problems\\[0\\]' must be an object"),
    "problem without path": (dict(problems=[{"reason": "x"}]),
                             "'problems\\[0\\]' misses its 'path'"),
    "problem path number": (dict(problems=[{"path": 3, "reason": "x", "page": 0}]),
                            "'problems\\[0\\].path' must be text, found int 3"),
    "problem page": (dict(problems=[{"path": "a", "reason": "x", "page": "1"}]),
                     "'problems\\[0\\].page' must be a page number"),
    "refinement list": (dict(refinement=[1]), "'refinement' must be a JSON object, found list"),
    "refinement passes": (dict(refinement={"passes": "two"}),
                          "'refinement.passes' must be an integer of at least 0, found str"),
    "refinement unconverged": (dict(refinement={"unconverged": [0]}),
                               "'refinement.unconverged' must be a list of mode numbers"),
    "updated from": (dict(updated_from={"images": -1}), "'updated_from.images' must be an "
                                                        "integer of at least 0, found int -1"),
    "colour of the images": (dict(color="rgb"),
                             "'color' says 'rgb' but the images have 1 channel"),
    "colour word": (dict(color=3), "'color' must be 'gray' or 'rgb', found int 3"),
}


def _meta_case(changes):
    return lambda good, tmp: with_metadata(good, tmp / "meta.npz", **changes)


def _impossible_shape(good, tmp):
    # the header declares 10**14 float32 values (400 TB) in a member of 240 bytes
    member = npy_bytes(header={"descr": "<f4", "fortran_order": False,
                               "shape": (10 ** 7, 10 ** 7)}, data=bytes(240))
    return rewrite(good, tmp / "huge.npz", {"basis.npy": member})


def _bomb(good, tmp):
    # 256 MB of zeros deflated to about 1 MB, declared consistently by the member's header
    return rewrite(good, tmp / "bomb.npz",
                   {"weights.npy": zeros_member((K, 256 * 2 ** 20 // (8 * K)), "<f8")})


def _bomb_metadata(good, tmp):
    # a metadata text of 64 Mi zero characters (256 MB): no other entry bounds its size
    return rewrite(good, tmp / "bomb_meta.npz", {"metadata.npy": zeros_member((), "<U67108864")})


def _object_array(good, tmp):
    return rewrite(good, tmp / "objects.npz",
                   {"paths.npy": npy_bytes(np.array([object()] * N, dtype=object))})


def _truncated(good, tmp):
    path = tmp / "truncated.npz"
    path.write_bytes(good.read_bytes()[: good.stat().st_size // 2])
    return path


def _bad_crc(good, tmp):
    raw = bytearray(good.read_bytes())
    with zipfile.ZipFile(good) as zf:
        info = zf.getinfo("weights.npy")
    # the data of a stored member starts after its 30-byte local header, name and extra field
    start = info.header_offset + 30 + len(info.filename) + len(info.extra) + 200
    raw[start] ^= 0xFF
    path = tmp / "crc.npz"
    path.write_bytes(bytes(raw))
    return path


def _exact_text(good, tmp):
    return rewrite(good, tmp / "exact.npz", {"exact.npy": npy_bytes(np.asarray("False"))})


def _metadata_bytes(good, tmp):
    return rewrite(good, tmp / "metabytes.npz", {"metadata.npy": npy_bytes(np.asarray(b"{}"))})


def _metadata_list(good, tmp):
    return rewrite(good, tmp / "metalist.npz", {"metadata.npy": npy_bytes(np.asarray("[1, 2]"))})


def _marks_out_of_range(good, tmp):
    return rewrite(good, tmp / "marks.npz", {"marks.npy": npy_bytes(np.full(N, 7, np.int8))})


def _folder(good, tmp):
    (tmp / "folder.npz").mkdir()
    return tmp / "folder.npz"


def _dangling(good, tmp):
    os.symlink(tmp / "gone.npz", tmp / "link.npz")
    return tmp / "link.npz"


def _text_file(good, tmp):
    (tmp / "notes.npz").write_text("hello")
    return tmp / "notes.npz"


CASES = {
    **{f"metadata: {name}": (_meta_case(changes), words)
       for name, (changes, words) in META_CASES.items()},
    "impossible shape": (_impossible_shape, "entry 'basis' declares shape \\(10000000, 10000000\\)"
                                            " of float32 \\(363.8 TB\\) but holds 240 bytes"),
    "zip bomb": (_bomb, "its entries would inflate to 256.0 MB from a file of \\d+\\.\\d KB "
                        "\\(more than 100 times"),
    "zip bomb in the metadata": (_bomb_metadata, "its entries would inflate to 256.0 MB"),
    "object array": (_object_array, "entry 'paths' holds Python objects \\(pickled data\\), "
                                    "which Modescope never loads"),
    "truncated": (_truncated, "not a usable Modescope model file: damaged or not an .npz file"),
    "bad checksum": (_bad_crc, "entry 'weights' is damaged \\(Bad CRC-32"),
    "exact as text": (_exact_text, "entry 'exact' must be True or False, found <U5"),
    "metadata bytes": (_metadata_bytes, "entry 'metadata' must be JSON text, found \\|S2"),
    "metadata list": (_metadata_list, "'metadata' is not JSON text \\(not a JSON object: found "
                                      "list\\)"),
    "marks out of range": (_marks_out_of_range, "'marks' must hold integers from 0 to 2, found "
                                                "7 to 7"),
    "folder": (_folder, "is a folder, not a model file"),
    "dangling link": (_dangling, "a link to a missing file"),
    "text file": (_text_file, "damaged or not an .npz file"),
}


@pytest.fixture(scope="module")
def good(tmp_path_factory):
    return make_good(tmp_path_factory.mktemp("good"))


def test_the_good_file_with_every_metadata_field_loads(good, tmp_path, capsys):
    d = load_model(good)
    assert d.metadata == good_metadata()
    assert d.singular_value_error.tolist() == [1e-9] * K and d.n_images == N
    assert cli_main(["info", str(good)]) == 0
    out = capsys.readouterr().out
    assert f"images:       {N}" in out
    assert "skipped files: 2 files (first: /data/broken.png: cannot be decoded)" in out
    # a deflated copy (numpy's savez_compressed layout) inflates a few times only: accepted
    packed = rewrite(good, tmp_path / "packed.npz", compress=zipfile.ZIP_DEFLATED)
    assert packed.stat().st_size < good.stat().st_size
    np.testing.assert_array_equal(load_model(packed).weights, d.weights)
    # unknown metadata fields (a newer writer's) are kept and ignored
    assert load_model(with_metadata(good, tmp_path / "more.npz", later={"x": 1})).metadata[
        "later"] == {"x": 1}


@pytest.mark.parametrize("case", list(CASES))
def test_load_model_refuses_with_one_clear_message(case, good, tmp_path):
    make, words = CASES[case]
    path = make(good, tmp_path)
    tracemalloc.start()
    try:
        with pytest.raises(ModelFileError) as info:
            load_model(path)
        peak = tracemalloc.get_traced_memory()[1]
    finally:
        tracemalloc.stop()
    message = str(info.value)
    assert message.startswith(f"{path}: ")
    assert __import__("re").search(words, message), message
    assert "allow_pickle" not in message and "\n" not in message
    assert isinstance(info.value, ModescopeError) and info.value.__cause__ is None
    # refused from the headers: never more than a few MB allocated (the bombs declare 256 MB,
    # the impossible shape 400 TB)
    assert peak < 16 * 2 ** 20


@pytest.mark.parametrize("case", list(CASES))
def test_info_prints_one_line_and_exits_1(case, good, tmp_path, capsys):
    path = CASES[case][0](good, tmp_path)
    assert cli_main(["info", str(path)]) == 1
    out, err = capsys.readouterr()
    assert out == ""
    assert err.startswith(f"modescope info: {path}: ") and err.count("\n") == 1, err
    assert "Traceback" not in err and "allow_pickle" not in err


@pytest.mark.parametrize("argv", [["outliers"], ["duplicates"], ["export", "--rank", "1",
                                                                  "--out", "OUT"],
                                  ["update", "SRC", "-o", "OUT/new.npz"]])
def test_every_command_names_the_file_and_the_field(argv, good, tmp_path, capsys):
    path = with_metadata(good, tmp_path / "meta.npz", options={"rank": "many"})
    (tmp_path / "SRC").mkdir()
    argv = [a.replace("OUT", str(tmp_path / "out")).replace("SRC", str(tmp_path / "SRC"))
            for a in argv]
    assert cli_main([argv[0], str(path), *argv[1:]]) == 1
    out, err = capsys.readouterr()
    # one line: the command, the file, the field (the verbs word their prefix themselves)
    assert err.startswith(f"modescope {argv[0]}: ") and err.count("\n") == 1, err
    assert f"{path}: not a usable Modescope model file: metadata field" in err
    assert "'options' does not hold usable analysis options (rank must be an integer" in err
    assert not (tmp_path / "out").exists()


def _without_hanging(call, fifo):
    """Run ``call`` in a thread; if it is still blocked after 10 s, release the FIFO (open it
    for writing) and fail."""
    outcome = {}

    def target():
        try:
            outcome["value"] = call()
        except BaseException as exc:  # noqa: BLE001 - handed to the test
            outcome["error"] = exc

    thread = threading.Thread(target=target, daemon=True)
    thread.start()
    thread.join(10)
    if thread.is_alive():
        fd = os.open(fifo, os.O_WRONLY | os.O_NONBLOCK)
        os.close(fd)
        thread.join(5)
        pytest.fail("reading a FIFO blocked")
    return outcome


@pytest.mark.skipif(not hasattr(os, "mkfifo"), reason="no named pipes on this system")
def test_a_fifo_is_refused_without_being_opened(tmp_path, capsys):
    fifo = tmp_path / "pipe.npz"
    os.mkfifo(fifo)
    outcome = _without_hanging(lambda: load_model(fifo), fifo)
    assert isinstance(outcome.get("error"), ModelFileError)
    assert str(outcome["error"]) == f"{fifo}: is a named pipe (FIFO), not a model file"
    outcome = _without_hanging(lambda: cli_main(["info", str(fifo)]), fifo)
    assert outcome.get("value") == 1
    assert capsys.readouterr().err == (f"modescope info: {fifo}: is a named pipe (FIFO), not a "
                                       f"model file\n")


def test_a_file_replaced_by_a_fifo_after_the_check_is_refused(tmp_path, monkeypatch):
    # the check is repeated on the descriptor opened without blocking
    fifo = tmp_path / "late.npz"
    os.mkfifo(fifo)
    monkeypatch.setattr(model_zip, "stat_regular", lambda path: 1000)
    outcome = _without_hanging(lambda: load_model(fifo), fifo)
    assert str(outcome.get("error")) == f"{fifo}: is a named pipe (FIFO), not a model file"


def test_totals_against_memory_and_floor(good):
    with zipfile.ZipFile(good) as zf:
        entries = model_zip.read_headers(good, zf, ["basis", "weights"])
    total = sum(e.info.file_size for e in entries.values())
    assert entries["basis"].nbytes == 20 * K * 4 and entries["weights"].nbytes == K * N * 8
    model_zip.check_totals(good, entries, file_size=1, memory=total)  # under the 64 MB floor
    with pytest.raises(ModelFileError, match=f"needs {total} bytes of memory, but only "
                                             f"{total - 1} bytes is available"):
        model_zip.check_totals(good, entries, file_size=10 ** 6, memory=total - 1)
    assert model_zip.available_memory() is None or model_zip.available_memory() > 0


def test_only_known_members_are_read(good, tmp_path):
    # an extra member (even one that declares a huge array) is never looked at
    path = rewrite(good, tmp_path / "extra.npz")
    with zipfile.ZipFile(path, "a") as zf:
        zf.writestr("extra.npy", npy_bytes(header={"descr": "<f8", "fortran_order": False,
                                                   "shape": (10 ** 9,)}))
    assert load_model(path).n_images == N
