"""``modescope analyze --engine dask``: the same model file as the local engine, and a clear
message, exit code 1, no traceback and no model file when the scheduler cannot be reached or a
worker dies. Clusters here run on loopback with two single-thread workers."""

from __future__ import annotations

import os
import socket

import numpy as np
import pytest
from PIL import Image

from modescope.app.cli.main import main
from modescope.core.output.model_file import load_model

_SKIP = "the Dask engine needs dask[array] and distributed (pip install 'modescope[cluster]')"


@pytest.fixture()
def folder(tmp_path):
    # invented: 5 smooth patterns with separated strengths plus noise, 12x10 gray PNG
    rng = np.random.default_rng(4)
    rows, cols = np.mgrid[0:12, 0:10] / 11.0
    patterns = np.array([np.cos(np.pi * (a * rows + b * cols))
                         for a, b in ((1, 0), (0, 1), (1, 1), (2, 0), (0, 2))])
    coeffs = rng.standard_normal((160, 5)) * np.array([50.0, 30.0, 20.0, 12.0, 7.0])
    images = 128 + np.tensordot(coeffs, patterns, axes=1) + rng.normal(0, 1.0, (160, 12, 10))
    out = tmp_path / "frames"
    out.mkdir()
    for i, img in enumerate(np.clip(np.round(images), 0, 255).astype(np.uint8)):
        Image.fromarray(img).save(out / f"f{i:03d}.png")
    return out


def _free_port() -> int:
    with socket.socket() as sock:
        sock.bind(("127.0.0.1", 0))
        return sock.getsockname()[1]


def test_dask_engine_writes_the_local_engines_model(folder, tmp_path, capsys):
    pytest.importorskip("distributed", reason=_SKIP)
    local, dask = tmp_path / "local.npz", tmp_path / "dask.npz"
    assert main(["analyze", str(folder), "-o", str(local), "--rank", "5", "--quiet"]) == 0
    capsys.readouterr()
    assert main(["analyze", str(folder), "-o", str(dask), "--rank", "5",
                 "--engine", "dask"]) == 0
    err = capsys.readouterr().err
    # progress from the workers, through the scheduler, on stderr
    assert "learn: 160/160 images (100%)" in err and "on the Dask cluster" in err
    assert "score: 160/160 images (100%)" in err
    assert "Traceback" not in err and f"wrote {dask}" in err
    a, b = load_model(dask), load_model(local)
    np.testing.assert_allclose(a.singular_values, b.singular_values, rtol=1e-4)
    # LAPACK (numpy.linalg.svd) of the centred float64 matrix of 8-bit / 255
    x = np.stack([np.asarray(Image.open(p), dtype=np.float64).ravel() / 255.0
                  for p in b.paths], axis=1)
    s = np.linalg.svd(x - x.mean(axis=1, keepdims=True), compute_uv=False)
    np.testing.assert_allclose(a.singular_values, s[:5], rtol=1e-4)
    signs = np.sign(np.sum(a.weights * b.weights, axis=1))
    np.testing.assert_allclose(a.weights, signs[:, None] * b.weights, atol=1e-3 * s[0])
    with np.load(dask) as za, np.load(local) as zb:
        assert sorted(za.files) == sorted(zb.files)
    assert a.metadata["engine"]["scheduler"] == "local cluster"


def test_unreachable_scheduler_exit_code_message_and_no_file(folder, tmp_path, capsys):
    pytest.importorskip("distributed", reason=_SKIP)
    out = tmp_path / "model.npz"
    address = f"tcp://127.0.0.1:{_free_port()}"
    code = main(["analyze", str(folder), "-o", str(out), "--engine", "dask",
                 "--scheduler", address, "--quiet"])
    err = capsys.readouterr().err
    assert code == 1
    assert err.startswith(f"modescope analyze: cannot reach the Dask scheduler at '{address}'")
    assert "Traceback" not in err and "nothing usable" not in err
    assert not out.exists() and sorted(os.listdir(tmp_path)) == ["frames"]


def test_scheduler_needs_the_dask_engine(folder, tmp_path, capsys):
    code = main(["analyze", str(folder), "-o", str(tmp_path / "m.npz"),
                 "--scheduler", "tcp://127.0.0.1:8786"])
    assert code == 2
    assert "--scheduler needs --engine dask" in capsys.readouterr().err


def test_a_worker_killed_mid_run_is_a_clear_error_and_no_file(folder, tmp_path, capsys):
    pytest.importorskip("distributed", reason=_SKIP)
    import dask
    from distributed import Client, LocalCluster
    from distributed.diagnostics.plugin import WorkerPlugin

    class KillOnProjection(WorkerPlugin):
        """Kill the worker process as soon as it starts a task of a refinement pass."""

        def transition(self, key, start, finish, **kwargs):
            if finish == "executing" and "project_block_sums" in str(key):
                os._exit(1)

    out = tmp_path / "model.npz"
    # one death is enough to give up on a task (the default retries it on 3 more workers)
    with dask.config.set({"distributed.scheduler.allowed-failures": 0}):
        with LocalCluster(n_workers=2, threads_per_worker=1, processes=True,
                          host="127.0.0.1", protocol="tcp://", dashboard_address=None,
                          memory_limit="1GiB", silence_logs=50,
                          scheduler_kwargs={"dashboard_address": "127.0.0.1:0"}) as cluster, \
                Client(cluster, set_as_default=False) as client:
            client.register_plugin(KillOnProjection())
            code = main(["analyze", str(folder), "-o", str(out), "--engine", "dask",
                         "--scheduler", cluster.scheduler_address, "--quiet"])
    err = capsys.readouterr().err
    assert code == 1
    assert "modescope analyze: a Dask worker died during refinement pass 1" in err
    assert "nothing written" in err and "Traceback" not in err
    assert not out.exists() and sorted(os.listdir(tmp_path)) == ["frames"]


def test_without_the_cluster_extra_the_message_names_it(folder, tmp_path, capsys, monkeypatch):
    import builtins
    real = builtins.__import__

    def no_dask(name, *args, **kwargs):
        if name.split(".")[0] in ("dask", "distributed"):
            raise ImportError(f"No module named {name.split('.')[0]!r}")
        return real(name, *args, **kwargs)
    monkeypatch.setattr(builtins, "__import__", no_dask)
    out = tmp_path / "m.npz"
    code = main(["analyze", str(folder), "-o", str(out), "--engine", "dask", "--quiet"])
    err = capsys.readouterr().err
    assert code == 1
    assert err.startswith("modescope analyze: the Dask engine needs the optional packages "
                          "dask[array] and distributed (missing: dask")
    assert "pip install 'modescope[cluster]'" in err and "Traceback" not in err
    assert not out.exists()
