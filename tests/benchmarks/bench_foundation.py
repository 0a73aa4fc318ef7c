"""Benchmark of the foundation: decoding, `modescope analyze` at k = 50 against scikit-learn's
IncrementalPCA, accuracy of both against an exact SVD, and peak memory.

Not collected by the test run (file name does not start with ``test_``). Run it with

    .venv/bin/python tests/benchmarks/bench_foundation.py [--quick] [--workdir DIR]

It writes two generated collections (germination-tray frames from ``modescope.core.demo``) once
into the work folder (default: a ``modescope-bench`` folder in the system temp folder):
5,000 gray 128x128 PNG and 2,000 RGB 256x256 JPEG (``--quick``: 1,000 and 400). Every
measurement runs in its own child process and reports that process's own peak resident memory
(``VmHWM`` from ``/proc/self/status``; ``ru_maxrss`` is not used where avoidable because Linux
carries it across fork and exec, so a child of a large parent reports the parent's peak).

Accuracy references: the exact top-50 singular values and total energy of the centred matrix
from scipy's ARPACK ``svds`` (tol=0) on the whole matrix held in memory; the reconstruction error
of a method with orthonormal basis U is ``||C||^2 - ||U^T C||^2`` and the optimum is
``||C||^2 - sum_{j<=50} s_j^2`` (Eckart-Young-Mirsky).
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import tempfile
import time
from concurrent.futures import ProcessPoolExecutor
from pathlib import Path

import numpy as np

K = 50


# ------------------------------------------------------------------------------------------
def _write_one(args):
    folder, index, n, size, color, fmt = args
    from PIL import Image
    from modescope.core.demo import render_frame
    rgb = render_frame(index, n_frames=n, size=size, seed=11)
    img = Image.fromarray(rgb)
    if color == "gray":
        img = img.convert("L")
    from modescope.core.output.atomic import atomic_writer
    name = Path(folder) / f"frame_{index:05d}.{fmt}"
    with atomic_writer(name, "wb", overwrite=True) as fh:
        if fmt == "jpg":
            img.save(fh, format="JPEG", quality=90)
        else:
            img.save(fh, format="PNG")


def make_collection(folder: Path, n: int, size, color: str, fmt: str) -> Path:
    done = folder / ".complete"
    if done.exists() and done.read_text() == f"{n} {size} {color} {fmt}":
        return folder
    folder.mkdir(parents=True, exist_ok=True)
    for p in folder.iterdir():
        p.unlink()
    t = time.perf_counter()
    with ProcessPoolExecutor(2) as pool:
        list(pool.map(_write_one, [(str(folder), i, n, size, color, fmt) for i in range(n)],
                      chunksize=64))
    done.write_text(f"{n} {size} {color} {fmt}")
    print(f"  wrote {n} {color} {size[0]}x{size[1]} {fmt} frames in "
          f"{time.perf_counter() - t:.1f} s into {folder}", flush=True)
    return folder


# ------------------------------------------------------------------------------------------
PEAK = r"""
def _peak_mb():
    try:
        with open("/proc/self/status") as f:
            for line in f:
                if line.startswith("VmHWM:"):
                    return int(line.split()[1]) / 1024
    except OSError:
        pass
    import resource
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
"""

CHILD_DECODE = PEAK + r"""
import json, sys, time
from modescope.core.engine.pipeline import AnalysisOptions, decode_workers, scan
from modescope.core.sources.decode import iter_blocks
folder, color = sys.argv[1], sys.argv[2]
t = time.perf_counter()
opts = AnalysisOptions(color=color)
ss = scan([folder], opts)
n = 0
for b in iter_blocks(ss, block_size=64, workers=decode_workers(ss, opts)):
    n += b.data.shape[1]
print(json.dumps({"seconds": time.perf_counter() - t, "images": n, "peak_mb": _peak_mb()}))
"""

CHILD_IPCA = PEAK + r"""
import json, sys, time
import numpy as np
from threadpoolctl import threadpool_limits
from sklearn.decomposition import IncrementalPCA
from modescope.core.engine.pipeline import AnalysisOptions, scan
from modescope.core.sources.decode import iter_blocks
folder, color, batch, out = sys.argv[1], sys.argv[2], int(sys.argv[3]), sys.argv[4]
t = time.perf_counter()
ss = scan([folder], AnalysisOptions(color=color))
ipca = IncrementalPCA(n_components=50)
pending = []
have = 0
with threadpool_limits(limits=2, user_api="blas"):
    for b in iter_blocks(ss, block_size=64, workers=2):
        pending.append(b.data.T)
        have += b.data.shape[1]
        while have >= batch:
            chunk = np.concatenate(pending, axis=0)
            ipca.partial_fit(chunk[:batch])
            rest = chunk[batch:]
            pending, have = ([rest] if len(rest) else []), len(rest)
    if have >= 50:
        ipca.partial_fit(np.concatenate(pending, axis=0))
np.savez(out, components=ipca.components_, singular_values=ipca.singular_values_,
         mean=ipca.mean_)
print(json.dumps({"seconds": time.perf_counter() - t, "peak_mb": _peak_mb()}))
"""

# runs the command line in a fresh interpreter (as the console script does) and writes that
# process's own peak memory to the file named first
RUN_CLI = PEAK + r"""
import sys
report = sys.argv[1]
from modescope.app.cli.main import main
try:
    code = main(sys.argv[2:])
finally:
    with open(report, "w") as f:
        f.write(str(_peak_mb()))
sys.exit(code)
"""

CHILD_ANALYZE = r"""
import json, os, subprocess, sys, tempfile, time
report = tempfile.mktemp(suffix=".peak")
t = time.perf_counter()
proc = subprocess.run([sys.argv[1], "-c", sys.argv[2], report] + sys.argv[3:],
                      capture_output=True, text=True)
elapsed = time.perf_counter() - t
if proc.returncode != 0:
    sys.stderr.write(proc.stderr)
    raise SystemExit(proc.returncode)
with open(report) as f:
    peak = float(f.read())
os.unlink(report)
print(json.dumps({"seconds": elapsed, "peak_mb": peak}))
"""


def run_child(code: str, *args) -> dict:
    proc = subprocess.run([sys.executable, "-c", code, *map(str, args)], capture_output=True,
                          text=True)
    if proc.returncode != 0:
        raise SystemExit(f"benchmark step failed:\n{proc.stderr}")
    return json.loads(proc.stdout.strip().splitlines()[-1])


def exact_reference(folder: Path, color: str):
    from scipy.sparse.linalg import svds
    from modescope.core.engine.pipeline import AnalysisOptions, scan
    from modescope.core.sources.decode import iter_blocks
    ss = scan([folder], AnalysisOptions(color=color))
    cols = [b.data for b in iter_blocks(ss, block_size=256, workers=2)]
    x = np.concatenate(cols, axis=1)
    mean = x.mean(axis=1, dtype=np.float64)
    c = x - mean.astype(np.float32)[:, None]
    total = float(np.einsum("ij,ij->", c, c, dtype=np.float64))
    t = time.perf_counter()
    s = svds(c, k=K, tol=0, return_singular_vectors=False, random_state=0)
    s = np.sort(s)[::-1].astype(np.float64)
    return c, total, s, time.perf_counter() - t


def accuracy(c, total, s_ref, basis_rows, s_method):
    """Largest relative error of the top-K singular values; reconstruction error relative to the
    optimal rank-K error (Eckart-Young-Mirsky)."""
    sv_err = float(np.max(np.abs(np.asarray(s_method[:K]) - s_ref) / s_ref))
    proj = basis_rows.astype(np.float32) @ c            # K x n
    err = total - float(np.einsum("ij,ij->", proj, proj, dtype=np.float64))
    optimum = total - float(np.sum(s_ref ** 2))
    return sv_err, float(np.sqrt(max(err, 0) / optimum))


def bench_set(name, folder, color, n, quick, batches):
    print(f"\n== {name}: {n} images ==", flush=True)
    dec = run_child(CHILD_DECODE, folder, color)
    print(f"decode only (scan + Pillow):      {dec['seconds']:7.2f} s  "
          f"({dec['images'] / dec['seconds']:,.0f} images/s), peak {dec['peak_mb']:,.0f} MB",
          flush=True)
    with tempfile.TemporaryDirectory() as tmp:
        model = Path(tmp) / "model.npz"
        cli = [sys.executable, RUN_CLI, "analyze", str(folder), "-o",
               str(model), "--rank", str(K), "--color", color, "--quiet"]
        ana = run_child(CHILD_ANALYZE, *cli)
        from modescope.core.output.model_file import load_model
        d = load_model(model)
        print(f"modescope analyze k={K}:           {ana['seconds']:7.2f} s, "
              f"peak {ana['peak_mb']:,.0f} MB", flush=True)
        ipca_runs = []
        for batch in batches:
            out = Path(tmp) / f"ipca_{batch}.npz"
            r = run_child(CHILD_IPCA, folder, color, batch, out)
            r["batch"] = batch
            r["file"] = out
            ipca_runs.append(r)
            print(f"IncrementalPCA k={K} batch {batch:4d}:   {r['seconds']:7.2f} s, "
                  f"peak {r['peak_mb']:,.0f} MB", flush=True)
        best = min(ipca_runs, key=lambda r: r["seconds"])
        c, total, s_ref, t_ref = exact_reference(folder, color)
        print(f"exact reference (ARPACK svds k={K} in memory): {t_ref:.1f} s", flush=True)
        ms_sv, ms_rec = accuracy(c, total, s_ref, d.basis.T, d.singular_values)
        with np.load(best["file"]) as z:
            ip_sv, ip_rec = accuracy(c, total, s_ref, z["components"], z["singular_values"])
        data_mb = c.nbytes / 2 ** 20
    print(f"{'':34s} {'time':>8s} {'max rel sv err':>15s} {'recon err / optimal':>20s} "
          f"{'peak MB':>8s}")
    print(f"{'modescope analyze':34s} {ana['seconds']:8.2f} {ms_sv:15.2e} {ms_rec:20.6f} "
          f"{ana['peak_mb']:8.0f}")
    print(f"{'IncrementalPCA (best batch ' + str(best['batch']) + ')':34s} {best['seconds']:8.2f} "
          f"{ip_sv:15.2e} {ip_rec:20.6f} {best['peak_mb']:8.0f}")
    print(f"speed-up: {best['seconds'] / ana['seconds']:.1f}x;  data matrix in float32 would be "
          f"{data_mb:,.0f} MB; weights {K * n * 8 / 2 ** 20:.1f} MB")
    return {"analyze_s": ana["seconds"], "ipca_s": best["seconds"], "sv_err": ms_sv,
            "ipca_sv_err": ip_sv, "peak_mb": ana["peak_mb"]}


def memory_growth(folder, color, n_small):
    """Peak memory of `modescope analyze` on the first n_small files vs on all of them."""
    files = sorted(Path(folder).glob("frame_*"))[:n_small]
    with tempfile.TemporaryDirectory() as tmp:
        sub = Path(tmp) / "subset"
        sub.mkdir()
        for f in files:
            os.symlink(f, sub / f.name)
        cli = [sys.executable, RUN_CLI, "analyze", str(sub), "-o",
               str(Path(tmp) / "m.npz"), "--rank", str(K), "--color", color, "--quiet"]
        return run_child(CHILD_ANALYZE, *cli)["peak_mb"]


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--quick", action="store_true", help="smaller collections (1,000 / 400)")
    ap.add_argument("--workdir", type=Path,
                    default=Path(tempfile.gettempdir()) / "modescope-bench")
    ap.add_argument("--only", choices=("gray", "rgb"), help="run one collection only")
    args = ap.parse_args(argv)
    n_gray, n_rgb = (1000, 400) if args.quick else (5000, 2000)
    print("generating collections (once; cached in the work folder)", flush=True)
    results = {}
    if args.only in (None, "gray"):
        g = make_collection(args.workdir / f"gray128_{n_gray}", n_gray, (128, 128), "gray", "png")
        results["gray"] = bench_set("gray 128x128 PNG", g, "gray", n_gray, args.quick,
                                    (100, 200, 500))
        small = max(n_gray // 5, 200)
        peak_small = memory_growth(g, "gray", small)
        print(f"peak memory of analyze: {peak_small:,.0f} MB for {small} images vs "
              f"{results['gray']['peak_mb']:,.0f} MB for {n_gray} images")
    if args.only in (None, "rgb"):
        r = make_collection(args.workdir / f"rgb256_{n_rgb}", n_rgb, (256, 256), "rgb", "jpg")
        results["rgb"] = bench_set("rgb 256x256 JPEG", r, "rgb", n_rgb, args.quick, (100, 200))
        small = max(n_rgb // 5, 100)
        peak_small = memory_growth(r, "rgb", small)
        print(f"peak memory of analyze: {peak_small:,.0f} MB for {small} images vs "
              f"{results['rgb']['peak_mb']:,.0f} MB for {n_rgb} images")
    return 0


if __name__ == "__main__":
    sys.exit(main())
