"""The Dask engine against the local engine and LAPACK, on a LocalCluster on loopback.

References: LAPACK's SVD through ``numpy.linalg.svd`` of the centred float64 matrix, and the
local engine (:func:`modescope.core.engine.pipeline.analyze`), on scikit-learn's bundled digits
and on an invented low-rank-plus-noise collection. The cluster is two workers of one thread
each, as threads of this process (bounded, quick to start); the worker-death case, which needs
worker processes, is in tests/cli/test_dask_cli.py.
"""

from __future__ import annotations

import builtins
import dataclasses

import numpy as np
import pytest
from PIL import Image

from modescope.core.engine.cluster import ClusterError, analyze_on_cluster, require_dask
from modescope.core.engine.pipeline import AnalysisOptions, analyze
from modescope.core.errors import NoUsableImagesError
from modescope.core.output.model_file import load_model, save_model

_SKIP = "the Dask engine needs dask[array] and distributed (pip install 'modescope[cluster]')"


def _write(folder, images):
    folder.mkdir(parents=True, exist_ok=True)
    paths = []
    for i, img in enumerate(images):
        path = folder / f"img_{i:04d}.png"
        Image.fromarray(img).save(path)
        paths.append(path)
    return paths


def _lapack(paths):
    # reference: LAPACK SVD (numpy.linalg.svd) of the centred float64 matrix of 8-bit / 255
    x = np.stack([np.asarray(Image.open(p), dtype=np.float64).ravel() / 255.0
                  for p in paths], axis=1)
    centred = x - x.mean(axis=1, keepdims=True)
    u, s, _ = np.linalg.svd(centred, full_matrices=False)
    return x, centred, u, s


@pytest.fixture(scope="module")
def client():
    pytest.importorskip("dask.array", reason=_SKIP)
    pytest.importorskip("distributed", reason=_SKIP)
    from modescope.core.engine.cluster import open_client
    with open_client(local_workers=2, local_processes=False, memory_limit="1GiB") as made:
        yield made


@pytest.fixture(scope="module")
def digits(tmp_path_factory):
    # open data set shipped inside scikit-learn: 8x8 digit images with values 0..16
    from sklearn.datasets import load_digits
    images = np.round(load_digits().images[:700] * (255 / 16)).astype(np.uint8)
    folder = tmp_path_factory.mktemp("dask_digits")
    return folder, _write(folder, images)


@pytest.fixture(scope="module")
def invented(tmp_path_factory):
    # invented: 6 smooth patterns with well separated strengths plus a little noise, 16x14
    rng = np.random.default_rng(11)
    rows, cols = np.mgrid[0:16, 0:14] / 15.0
    patterns = [np.sin(np.pi * (a * rows + b * cols)) for a, b in
                ((1, 0), (0, 1), (1, 1), (2, 0), (0, 2), (2, 1))]
    strengths = np.array([60.0, 40.0, 28.0, 18.0, 11.0, 6.0])
    coeffs = rng.standard_normal((6, 420)) * strengths[:, None]
    images = 128 + np.tensordot(coeffs.T, np.array(patterns), axes=1) + \
        rng.normal(0, 1.5, (420, 16, 14))
    folder = tmp_path_factory.mktemp("dask_invented")
    return folder, _write(folder, np.clip(np.round(images), 0, 255).astype(np.uint8))


def _same_weights(a, b, scale):
    # equal up to the sign of each mode (both engines fix signs the same way; checked anyway)
    signs = np.sign(np.sum(a * b, axis=1))
    np.testing.assert_allclose(a, signs[:, None] * b, atol=1e-3 * scale)


def test_digits_match_local_engine_and_lapack(client, digits):
    folder, paths = digits
    _, _, u, s = _lapack(paths)
    options = AnalysisOptions(rank=10, block_size=64)
    local = analyze([folder], options).decomposition
    result = analyze_on_cluster([folder], options, client=client)
    d = result.decomposition
    assert not result.cancelled and d.exact and d.n_images == 700
    # the task's bound: within 1e-4 (relative) of the local engine and of LAPACK
    np.testing.assert_allclose(d.singular_values, local.singular_values, rtol=1e-4)
    np.testing.assert_allclose(d.singular_values, s[:10], rtol=1e-4)
    _same_weights(d.weights, local.weights, s[0])
    _same_weights(d.weights, u[:, :10].T @ _lapack(paths)[1], s[0])
    np.testing.assert_allclose(d.mean, local.mean, atol=1e-6)
    np.testing.assert_allclose(d.residual, local.residual, rtol=1e-3, atol=1e-6 * s[0] ** 2)
    # the same certificate: bounds of the same size, every mode certified in both
    assert d.singular_value_error is not None
    assert np.all(d.singular_value_error <= 1e-4 * d.singular_values)
    assert d.metadata["refinement"]["converged_modes"] == 10
    assert d.paths == local.paths


def test_invented_collection_and_model_file(client, invented, tmp_path):
    folder, paths = invented
    _, centred, u, s = _lapack(paths)
    options = AnalysisOptions(rank=6, block_size=50)
    local = analyze([folder], options).decomposition
    d = analyze_on_cluster([folder], options, client=client).decomposition
    np.testing.assert_allclose(d.singular_values, s[:6], rtol=1e-4)
    np.testing.assert_allclose(d.singular_values, local.singular_values, rtol=1e-4)
    _same_weights(d.weights, local.weights, s[0])
    _same_weights(d.weights, u[:, :6].T @ centred, s[0])
    assert d.total_energy == pytest.approx(np.sum(centred ** 2), rel=1e-5)
    # the same model file: the same members and metadata fields (plus the engine's note)
    ours = save_model(tmp_path / "dask.npz", d)
    theirs = save_model(tmp_path / "local.npz", local)
    with np.load(ours) as a, np.load(theirs) as b:
        assert sorted(a.files) == sorted(b.files)
    back = load_model(ours)
    assert set(back.metadata) - set(local.metadata) == {"engine"}
    assert back.metadata["engine"]["name"] == "dask"
    assert back.metadata["refinement"]["passes"] == local.metadata["refinement"]["passes"]
    np.testing.assert_array_equal(back.singular_values, d.singular_values)


def test_range_finder_start_with_power_iteration(client, invented):
    # the dask.array range finder (Halko, Martinsson and Tropp 2011) on the dask array of columns
    folder, paths = invented
    s = _lapack(paths)[3]
    options = AnalysisOptions(rank=6, block_size=50)
    d = analyze_on_cluster([folder], options, client=client, start="range",
                           power_iterations=1).decomposition
    np.testing.assert_allclose(d.singular_values, s[:6], rtol=1e-4)
    engine = d.metadata["engine"]
    assert engine["start"] == "range" and engine["power_iterations"] == 1
    # a mean pass, one range-finder pass plus two per power iteration, the refinement passes
    assert engine["passes_over_data"] == 1 + 3 + d.metadata["refinement"]["passes"]


def test_progress_comes_from_the_workers(client, invented):
    folder, _ = invented
    seen = []
    analyze_on_cluster([folder], AnalysisOptions(rank=3, block_size=50), client=client,
                       progress=seen.append)
    learn = [p for p in seen if p.stage == "learn"]
    score = [p for p in seen if p.stage == "score"]
    assert learn[-1].done == learn[-1].total == 420
    assert score and score[-1].done == 420 and "Dask cluster" in score[-1].detail
    # counts only grow within a pass and never pass the total
    assert all(0 <= p.done <= p.total for p in seen)


def test_an_image_that_fails_to_decode_is_left_out_as_locally(client, tmp_path):
    folder = tmp_path / "mixed"
    rng = np.random.default_rng(2)
    _write(folder, [rng.integers(0, 255, (9, 7), dtype=np.uint8) for _ in range(30)])
    good = (folder / "img_0003.png").read_bytes()
    (folder / "img_0003.png").write_bytes(good[:60])       # header kept, pixels cut off
    options = AnalysisOptions(rank=3, block_size=8)
    local = analyze([folder], options)
    result = analyze_on_cluster([folder], options, client=client)
    assert result.decomposition.n_images == local.decomposition.n_images == 29
    assert [p.path for p in result.problems] == [p.path for p in local.problems]
    assert result.problems[0].path.endswith("img_0003.png")
    np.testing.assert_allclose(result.decomposition.singular_values,
                               local.decomposition.singular_values, rtol=1e-4)


def test_cancel_before_the_first_pass_returns_no_decomposition(client, invented):
    folder, _ = invented
    result = analyze_on_cluster([folder], AnalysisOptions(rank=3), client=client,
                                cancel=lambda: True)
    assert result.cancelled and result.decomposition is None


def test_unreachable_scheduler_is_a_clear_error(invented):
    pytest.importorskip("distributed", reason=_SKIP)
    import socket
    with socket.socket() as sock:             # a port nothing listens on
        sock.bind(("127.0.0.1", 0))
        port = sock.getsockname()[1]
    address = f"tcp://127.0.0.1:{port}"
    with pytest.raises(ClusterError, match="cannot reach the Dask scheduler at 'tcp://127"):
        analyze_on_cluster([invented[0]], AnalysisOptions(rank=2), scheduler=address,
                           connect_timeout=1.0)


@pytest.mark.parametrize("kwargs, error, match", [
    ({"scheduler": 8786}, TypeError, "scheduler must be an address"),
    ({"start": "random"}, ValueError, "start"),
    ({"power_iterations": -1}, ValueError, "power_iterations"),
    ({"connect_timeout": 0}, ValueError, "connect_timeout must be positive"),
    ({"options": "rank=3"}, TypeError, "options must be AnalysisOptions"),
])
def test_arguments_are_checked_first(kwargs, error, match):
    kwargs = dict(kwargs)
    options = kwargs.pop("options", AnalysisOptions(rank=2))
    with pytest.raises(error, match=match):
        analyze_on_cluster(["nowhere"], options, **kwargs)


def test_missing_dask_names_the_extra(monkeypatch):
    real = builtins.__import__

    def no_dask(name, *args, **kwargs):
        if name == "distributed" or name.startswith("distributed."):
            raise ImportError("No module named 'distributed'")
        return real(name, *args, **kwargs)
    monkeypatch.setattr(builtins, "__import__", no_dask)
    with pytest.raises(ClusterError, match=r"pip install 'modescope\[cluster\]'") as info:
        require_dask()
    # distributed here; dask itself when the extra is not installed at all
    assert "missing: distributed" in str(info.value) or "missing: dask" in str(info.value)


def test_options_block_size_sets_the_tasks(client, invented):
    # block_size is the files per task: a different cut gives the same numbers
    folder, _ = invented
    a = analyze_on_cluster([folder], AnalysisOptions(rank=4, block_size=64), client=client)
    b = analyze_on_cluster([folder], dataclasses.replace(AnalysisOptions(rank=4),
                                                         block_size=25), client=client)
    np.testing.assert_allclose(a.decomposition.singular_values,
                               b.decomposition.singular_values, rtol=1e-5)


def test_a_file_that_changes_after_the_first_pass_is_dropped(client, invented, monkeypatch):
    # the workers are threads of this process: a patched decoder reaches them. From the first
    # refinement pass on, one image "fails" (as a file replaced during the analysis would).
    from modescope.core.engine.cluster import tasks
    from modescope.core.sources.scan import Problem

    folder, paths = invented
    real = tasks.decode
    state = {"broken": False}

    def decode(part, downscale):
        data, ok, problems = real(part, downscale)
        for j, ref in enumerate(part.images):
            if state["broken"] and ref.path.endswith("img_0007.png"):
                ok[j] = False
                problems = problems + (Problem(ref.path, "cannot be decoded (test)", None),)
        return data, ok, problems
    monkeypatch.setattr(tasks, "decode", decode)

    def progress(p):
        if p.stage == "score":
            state["broken"] = True
    result = analyze_on_cluster([folder], AnalysisOptions(rank=4, block_size=50),
                                client=client, progress=progress)
    d = result.decomposition
    assert d.n_images == 419 and not any(p.endswith("img_0007.png") for p in d.paths)
    assert any("changed or became unreadable during the analysis" in p.reason
               and p.path.endswith("img_0007.png") for p in result.problems)
    # the others are analysed exactly; the mean still counts the image as first read
    # (as the local engine does), so compare with LAPACK around that mean
    x = _lapack(paths)[0]
    keep = [i for i in range(420) if i != 7]
    centred = x[:, keep] - x.mean(axis=1, keepdims=True)
    s = np.linalg.svd(centred, compute_uv=False)
    np.testing.assert_allclose(d.singular_values, s[:4], rtol=1e-4)


def test_the_only_worker_leaving_mid_run_is_a_clear_error(invented):
    # the local cluster closes its only worker during the first refinement pass: the data
    # scattered to it (mean, basis) is gone, and the scheduler drops the pass's tasks
    pytest.importorskip("distributed", reason=_SKIP)
    from modescope.core.engine.cluster import open_client

    folder, _ = invented
    with open_client(local_workers=1, local_processes=False, memory_limit="1GiB") as own:
        def progress(p):
            if p.stage == "score" and own.cluster.workers:
                own.cluster.scale(0)
        with pytest.raises(ClusterError, match=r"the Dask cluster dropped refinement pass 1 "
                                               r"\(the scheduler cancelled its tasks: a worker "
                                               r"holding their data left"):
            analyze_on_cluster([folder], AnalysisOptions(rank=3, block_size=20), client=own,
                               progress=progress)


def test_a_cluster_without_workers_is_a_clear_error(invented, monkeypatch):
    # no worker at all: the run gives up after the grace period (shortened here) instead of
    # waiting for ever
    pytest.importorskip("distributed", reason=_SKIP)
    from distributed import Client, LocalCluster

    from modescope.core.engine.cluster import connect

    monkeypatch.setattr(connect, "NO_WORKER_GRACE", 1.0)
    with LocalCluster(n_workers=0, processes=False, host="127.0.0.1", protocol="tcp://",
                      dashboard_address=None, silence_logs=50,
                      scheduler_kwargs={"dashboard_address": "127.0.0.1:0"}) as cluster, \
            Client(cluster, set_as_default=False) as own:
        with pytest.raises(ClusterError, match="no Dask worker left for 1 s during the first "
                                               "pass; nothing written"):
            analyze_on_cluster([invented[0]], AnalysisOptions(rank=3), client=own)


def test_a_task_that_fails_on_a_worker_is_named(client, invented, monkeypatch):
    # a worker without Modescope fails to load the task's function: the error names the
    # cause and asks about the installation, as one ClusterError (no traceback for the user)
    from modescope.core.engine.cluster import tasks

    def broken(*args, **kwargs):
        raise ModuleNotFoundError("No module named 'modescope'")
    monkeypatch.setattr(tasks, "block_svd", broken)
    with pytest.raises(ClusterError, match=r"a task failed on a Dask worker during the first "
                                           r"pass \(ModuleNotFoundError: No module named "
                                           r"'modescope'; is the same Modescope version "
                                           r"installed on every worker\?\); nothing written"):
        analyze_on_cluster([invented[0]], AnalysisOptions(rank=2), client=client)


def test_files_no_worker_can_read(client, tmp_path):
    folder = tmp_path / "gone"
    _write(folder, [np.full((6, 5), i, np.uint8) for i in range(4)])
    from modescope.core.engine.pipeline import scan
    found = scan([folder], AnalysisOptions(rank=1))
    for p in folder.iterdir():               # scanned, then gone before the workers read them
        p.unlink()
    with pytest.raises(NoUsableImagesError, match="none of the 4 images could be decoded on "
                                                  "the Dask workers"):
        analyze_on_cluster(found, AnalysisOptions(rank=1), client=client)


def test_cancel_in_a_later_pass_keeps_the_last_complete_pass(client, digits):
    # as the local engine: a stop during pass 2 hands back pass 1 (exact weights, its bounds)
    folder, paths = digits
    state = {"stop": False}

    def progress(p):
        if p.stage == "score" and p.detail.startswith("pass 2"):
            state["stop"] = True
    result = analyze_on_cluster([folder], AnalysisOptions(rank=10, block_size=64),
                                client=client, progress=progress, cancel=lambda: state["stop"])
    d = result.decomposition
    assert result.cancelled and d.exact
    assert d.metadata["refinement"]["passes"] == 1 and d.metadata["refinement"]["interrupted"]
    # pass 1's Ritz values lie below the true ones (Cauchy interlacing), within their bounds
    s = _lapack(paths)[3][:10]
    assert np.all(d.singular_values <= s * (1 + 1e-6))
    assert np.all(s - d.singular_values <= d.singular_value_error * (1 + 1e-6))


def test_no_refine_is_one_plain_pass(client, invented):
    folder, paths = invented
    d = analyze_on_cluster([folder], AnalysisOptions(rank=4, refine=False),
                           client=client).decomposition
    assert d.singular_value_error is None and not d.metadata["refinement"]["certified"]
    assert d.metadata["refinement"]["passes"] == 1
    # the weights are the exact coordinates in the start basis: the reconstruction's error is
    # the stored residual, and never below the optimum (Eckart-Young-Mirsky)
    x, centred, _, s = _lapack(paths)
    recon = d.mean[:, None] + d.basis @ d.weights.astype(np.float32)
    err = np.sum((x - recon) ** 2, axis=0)
    np.testing.assert_allclose(d.residual, err, rtol=1e-3, atol=1e-6)
    assert err.sum() >= np.sum(s[4:] ** 2) * (1 - 1e-4)
