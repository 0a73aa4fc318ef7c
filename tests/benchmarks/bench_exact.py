"""Benchmark "exact numbers, certified, at any size": `modescope analyze` against four other ways
of getting the top-50 singular values of the same collection, with accuracy against an exact
reference.

Not collected by the test run (file name does not start with ``test_``). Run it on a quiet
machine with

    .venv/bin/python tests/benchmarks/bench_exact.py [--quick] [--repeat N] [--workdir DIR]

Collection: 5,000 (``--quick``: 1,000) invented gray 128x128 PNGs of a low-rank-plus-noise
model, written once into the work folder (default: a ``modescope-bench`` folder in the system
temp folder) by two writer processes. Every image is

    mean image + sum_j c_ij a_j P_j + Gaussian noise (sigma 3 grey levels), rounded, clipped to uint8

with 30 smooth random patterns ``P_j`` (low-pass filtered white noise, orthonormalised, scaled to
an RMS of one grey level), amplitudes ``a_j`` decaying geometrically from 10 to 0.8 grey levels,
per-image coefficients ``c_ij`` standard normal, and a smooth mean image around grey level 128.
Signal mode 30 has a singular value about sqrt(16384 * n) * 0.8 and the noise bulk ends near
3 * (sqrt(16384) + sqrt(n)), so the spectrum has a clear gap after mode 30 (the ratio
s_30 / s_31 is printed). Modes 31-50 are noise modes of a nearly flat spectrum.

Methods, each measured in its own child process (time of the work after the imports; peak
resident memory ``VmHWM`` of that process from ``/proc/self/status``), the page cache warmed by
one read of every file first:

(a) ``modescope.core.analyze`` with the options of ``modescope analyze --rank 50`` (defaults,
    and every core for the BLAS work of the passes after learning)
    (scan, learning pass, refinement passes with their certificate); reported with the options'
    oversample, tolerance and max_passes, the model's ``metadata["refinement"]``, how many of
    the 30 signal modes ``singular_value_error`` certifies within 1e-4 (relative), and how many
    modes have a true error larger than their certified bound (should be none);
(b) scikit-learn ``IncrementalPCA(n_components=50, batch_size=500)``, ``partial_fit`` on
    batches of 500 images decoded with Pillow (two decoding threads);
(c) decoding every file into one in-memory float32 matrix with Pillow in a
    ``ThreadPoolExecutor(2)``: the floor for any method that reads every pixel once;
(d) (c) then ``sklearn.utils.extmath.randomized_svd(n_components=50, n_oversamples=50,
    n_iter=4, random_state=0)`` on the centred float32 matrix;
(e) (c) then ``scipy.sparse.linalg.svds(k=50)`` (ARPACK, default tol=0) on the centred float32
    matrix.
Pixels are decoded as ``v / 255`` in float32, as modescope's decoder does for 8-bit gray. The
baselines use their libraries' default BLAS threads; (a) uses its own default (one BLAS thread,
two decoding threads).

Accuracy reference: the exact singular values of the centred matrix (16384 x n), computed in
float64 with the Gram trick: ``G = C^T C`` (n x n, float64) and ``scipy.linalg.eigh``, s_j =
sqrt(lambda_j). Forming G and its symmetric eigensolver each perturb an eigenvalue by a few
float64 epsilons times ``||C||_2^2 = s_1^2``, so the relative error of s_j is of order
``eps * (s_1 / s_j)^2`` (about 1e-14 for the signal modes and 1e-11 for the noise modes here),
many orders below anything measured: exact enough, and it takes seconds where a full SVD of the
16384 x 5000 matrix takes minutes. The reference is cached next to the collection.

Every method runs ``--repeat`` times (default 3), round by round (each method once per round, so
that a slow spell of the machine falls on all of them); the table shows each method's median
time with its range, and the ratios are taken between medians (and printed per round too).

Printed: a compact table (time, peak memory, largest relative error of the 30 signal modes and
of all 50 modes), the ratios the issue asks for -- speed-up of (a) against (b) (target >= 10x),
time of (a) against the decode floor (c) (target within 2x), (a)'s largest relative error of the
signal modes (target 1e-4) -- and one JSON line with every figure.
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
MODES = 30
SIDE = 128
NOISE = 3.0            # grey levels
AMP_FIRST, AMP_LAST = 10.0, 0.8
SEED = 20261202
GENERATOR = f"lowrank v1 side={SIDE} modes={MODES} noise={NOISE} amps={AMP_FIRST}-{AMP_LAST} " \
            f"seed={SEED}"


# ----- the invented collection ------------------------------------------------------------
_MODEL = {}


def _model():
    """Return (mean image, orthonormal patterns scaled to RMS 1 (pixels x MODES), amplitudes)."""
    if "m" not in _MODEL:
        rng = np.random.default_rng(SEED)
        f = np.fft.fftfreq(SIDE)
        lowpass = np.exp(-(f[:, None] ** 2 + f[None, :] ** 2) / (2 * (4 / SIDE) ** 2))

        def smooth():
            return np.fft.ifft2(np.fft.fft2(rng.standard_normal((SIDE, SIDE))) * lowpass).real

        q, _ = np.linalg.qr(np.stack([smooth().ravel() for _ in range(MODES)], axis=1))
        m = smooth().ravel()
        mean = 128.0 + 10.0 * m / np.abs(m).max()
        amps = AMP_FIRST * (AMP_LAST / AMP_FIRST) ** (np.arange(MODES) / (MODES - 1))
        _MODEL["m"] = (mean, q * SIDE, amps)
    return _MODEL["m"]


def _write_range(args):
    folder, start, stop = args
    from PIL import Image
    mean, patterns, amps = _model()
    clipped = 0
    for i in range(start, stop):
        rng = np.random.default_rng((SEED, i))
        x = mean + patterns @ (rng.standard_normal(MODES) * amps)
        x += NOISE * rng.standard_normal(x.size)
        np.rint(x, out=x)
        clipped += int(np.count_nonzero((x < 0) | (x > 255)))
        img = Image.fromarray(np.clip(x, 0, 255).astype(np.uint8).reshape(SIDE, SIDE), mode="L")
        name = Path(folder) / f"img_{i:06d}.png"
        tmp = name.with_suffix(".tmp")
        img.save(tmp, format="PNG")
        os.replace(tmp, name)
    return clipped


def make_collection(folder: Path, n: int) -> Path:
    """Write the n invented images into ``folder`` once (a marker file records what is there).

    Parameters
    ----------
    folder : Path
    n : int
        Number of images.

    Returns
    -------
    Path
        ``folder``.
    """
    done = folder / ".complete"
    if done.exists() and done.read_text() == f"{n} {GENERATOR}":
        return folder
    folder.mkdir(parents=True, exist_ok=True)
    for p in folder.iterdir():
        p.unlink()
    reference_file(folder).unlink(missing_ok=True)
    t = time.perf_counter()
    step = 250
    with ProcessPoolExecutor(2) as pool:
        clipped = sum(pool.map(_write_range, [(str(folder), s, min(s + step, n))
                                              for s in range(0, n, step)]))
    done.write_text(f"{n} {GENERATOR}")
    print(f"  wrote {n} gray {SIDE}x{SIDE} PNG in {time.perf_counter() - t:.1f} s into {folder} "
          f"(clipped pixels: {clipped / (n * SIDE * SIDE):.1e} of all)", flush=True)
    return folder


def reference_file(folder: Path) -> Path:
    return folder.with_name(folder.name + ".reference.npz")


def warm_cache(folder: Path) -> None:
    """Read every file once so that every method finds the files in the page cache."""
    for p in sorted(folder.glob("img_*.png")):
        p.read_bytes()


# ----- child processes --------------------------------------------------------------------
COMMON = r"""
import json, sys, time
import numpy as np
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path

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

def _files(folder):
    return sorted(str(p) for p in Path(folder).glob("img_*.png"))

_F255 = np.float32(255)

def _decode(paths, out, pool):
    # rows of out (len(paths) x pixels, float32) receive v / 255 of the 8-bit gray files
    from PIL import Image
    def one(i):
        with Image.open(paths[i]) as im:
            a = np.asarray(im if im.mode == "L" else im.convert("L"))
        np.divide(a.reshape(-1), _F255, out=out[i])
    list(pool.map(one, range(len(paths))))

def _decode_all(folder):
    paths = _files(folder)
    from PIL import Image
    with Image.open(paths[0]) as im:
        pixels = im.size[0] * im.size[1]
    x = np.empty((len(paths), pixels), dtype=np.float32)
    with ThreadPoolExecutor(2) as pool:
        _decode(paths, x, pool)
    return x

def _centre(x):
    x -= x.mean(axis=0, dtype=np.float64).astype(np.float32)
    return x

def _report(out, t0, **extra):
    seconds = time.perf_counter() - t0
    np.savez(out, **{k: v for k, v in extra.items() if isinstance(v, np.ndarray)})
    info = {k: v for k, v in extra.items() if not isinstance(v, np.ndarray)}
    print(json.dumps(dict(seconds=seconds, peak_mb=_peak_mb(), **info)))
"""

CHILD = {
    "analyze": COMMON + r"""
from modescope.core import AnalysisOptions, analyze
folder, out = sys.argv[1], sys.argv[2]
t0 = time.perf_counter()
# the options `modescope analyze --rank 50` uses: every core for the passes after learning
from modescope.app.cli.common import cores
opts = AnalysisOptions(rank=50, pass_blas_threads=cores())
d = analyze([folder], opts).decomposition
_report(out, t0, s=np.asarray(d.singular_values, dtype=np.float64),
        bound=np.asarray(d.singular_value_error, dtype=np.float64),
        options={"oversample": opts.oversample, "tolerance": opts.tolerance,
                 "max_passes": opts.max_passes, "blas_threads": opts.blas_threads,
                 "block_size": opts.block_size},
        refinement=d.metadata.get("refinement"), images=d.n_images)
""",
    "ipca": COMMON + r"""
from sklearn.decomposition import IncrementalPCA
folder, out = sys.argv[1], sys.argv[2]
batch = 500
t0 = time.perf_counter()
paths = _files(folder)
from PIL import Image
with Image.open(paths[0]) as im:
    pixels = im.size[0] * im.size[1]
ipca = IncrementalPCA(n_components=50, batch_size=batch)
buf = np.empty((batch, pixels), dtype=np.float32)
with ThreadPoolExecutor(2) as pool:
    for start in range(0, len(paths), batch):
        part = paths[start:start + batch]
        if len(part) < 50:          # partial_fit needs at least n_components samples
            break
        _decode(part, buf, pool)
        ipca.partial_fit(buf[:len(part)])
_report(out, t0, s=np.asarray(ipca.singular_values_, dtype=np.float64),
        images=int(ipca.n_samples_seen_))
""",
    "decode": COMMON + r"""
folder, out = sys.argv[1], sys.argv[2]
t0 = time.perf_counter()
x = _decode_all(folder)
_report(out, t0, images=x.shape[0], checksum=float(x[:, ::997].sum(dtype=np.float64)))
""",
    "rsvd": COMMON + r"""
from sklearn.utils.extmath import randomized_svd
folder, out = sys.argv[1], sys.argv[2]
t0 = time.perf_counter()
x = _centre(_decode_all(folder))
t1 = time.perf_counter()
_, s, _ = randomized_svd(x, n_components=50, n_oversamples=50, n_iter=4, random_state=0)
_report(out, t0, s=np.asarray(s, dtype=np.float64), decode_s=t1 - t0,
        svd_s=time.perf_counter() - t1)
""",
    "svds": COMMON + r"""
from scipy.sparse.linalg import svds
folder, out = sys.argv[1], sys.argv[2]
t0 = time.perf_counter()
x = _centre(_decode_all(folder))
t1 = time.perf_counter()
_, s, _ = svds(x, k=50, random_state=0)
_report(out, t0, s=np.sort(np.asarray(s, dtype=np.float64))[::-1], decode_s=t1 - t0,
        svd_s=time.perf_counter() - t1)
""",
    "reference": COMMON + r"""
import scipy.linalg
folder, out = sys.argv[1], sys.argv[2]
t0 = time.perf_counter()
x = _decode_all(folder).astype(np.float64)
x -= x.mean(axis=0)
total = float(np.einsum("ij,ij->", x, x))
g = x @ x.T                          # images x images, float64: the Gram matrix C^T C
del x
n = g.shape[0]
w = scipy.linalg.eigh(g, eigvals_only=True, subset_by_index=[max(n - 60, 0), n - 1])
s = np.sqrt(np.maximum(w[::-1], 0.0))
_report(out, t0, s=s, total_energy=total)
""",
}

LABELS = {
    "analyze": "(a) modescope analyze",
    "ipca": "(b) IncrementalPCA batch 500",
    "decode": "(c) decode all, 2 threads",
    "rsvd": "(d) decode + randomized_svd",
    "svds": "(e) decode + svds (ARPACK)",
}


def run_child(name: str, folder: Path, out: Path) -> dict:
    """Run one measurement in a fresh interpreter; return its JSON report and saved arrays.

    Parameters
    ----------
    name : str
        Key of :data:`CHILD`.
    folder : Path
        The collection.
    out : Path
        ``.npz`` file the child writes its arrays to.

    Returns
    -------
    dict
        The child's report plus ``process_s`` (wall time of the whole child, start-up and
        imports included) and its arrays.

    Raises
    ------
    SystemExit
        If the child fails.
    """
    t = time.perf_counter()
    proc = subprocess.run([sys.executable, "-c", CHILD[name], str(folder), str(out)],
                          capture_output=True, text=True)
    if proc.returncode != 0:
        raise SystemExit(f"benchmark step {name!r} failed:\n{proc.stderr}")
    report = json.loads(proc.stdout.strip().splitlines()[-1])
    report["process_s"] = time.perf_counter() - t
    with np.load(out) as z:
        report.update({k: z[k] for k in z.files})
    return report


def relative_errors(s_method, s_ref) -> tuple[float, float]:
    """Return the largest relative error of the signal modes and of all K modes.

    Parameters
    ----------
    s_method, s_ref : ndarray, shape (>= K,)
        Singular values, descending.

    Returns
    -------
    tuple of float
        (max over the first MODES, max over the first K) of ``|s - s_ref| / s_ref``.
    """
    rel = np.abs(np.asarray(s_method[:K], dtype=np.float64) - s_ref[:K]) / s_ref[:K]
    return float(rel[:MODES].max()), float(rel.max())


def reference(folder: Path, tmp: Path) -> dict:
    """Return the exact reference (cached next to the collection)."""
    cached = reference_file(folder)
    if cached.exists():
        with np.load(cached) as z:
            return {"s": z["s"], "seconds": float(z["seconds"]), "cached": True}
    r = run_child("reference", folder, tmp / "reference.npz")
    np.savez(cached, s=r["s"], seconds=r["seconds"])
    return {"s": r["s"], "seconds": r["seconds"], "cached": False}


def main(argv=None) -> int:
    """Run the benchmark; print the table and one JSON line. Returns the exit code."""
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--quick", action="store_true", help="1,000 images instead of 5,000")
    ap.add_argument("--repeat", type=int, default=3,
                    help="rounds of every method (default 3); the median time counts")
    ap.add_argument("--workdir", type=Path,
                    default=Path(tempfile.gettempdir()) / "modescope-bench")
    args = ap.parse_args(argv)
    n = 1000 if args.quick else 5000
    print(f"generating the collection (once; cached in {args.workdir})", flush=True)
    folder = make_collection(args.workdir / f"lowrank{MODES}_{SIDE}_{n}", n)
    warm_cache(folder)
    runs: dict = {}
    with tempfile.TemporaryDirectory() as tmp:
        tmp = Path(tmp)
        for round_ in range(max(1, args.repeat)):
            # round by round, every method once per round: a slow spell of the machine then
            # falls on every method alike rather than on one
            for name in ("decode", "analyze", "ipca", "rsvd", "svds"):
                r = run_child(name, folder, tmp / f"{name}.npz")
                runs.setdefault(name, []).append(r)
                print(f"  round {round_ + 1}  {LABELS[name]:30s} {r['seconds']:8.2f} s  "
                      f"peak {r['peak_mb']:7.0f} MB", flush=True)
        ref = reference(folder, tmp)
    runs = {name: _median_run(rounds) for name, rounds in runs.items()}
    s_ref = ref["s"]
    print(f"  exact reference (Gram matrix + eigh, float64): {ref['seconds']:.1f} s"
          f"{' (cached)' if ref['cached'] else ''}; gap s_{MODES}/s_{MODES + 1} = "
          f"{s_ref[MODES - 1] / s_ref[MODES]:.1f}", flush=True)
    return report(n, runs, s_ref)


def _median_run(rounds: list) -> dict:
    """The report of the round with the median time (the lower middle one for an even count),
    plus every round's time and peak."""
    ordered = sorted(rounds, key=lambda r: r["seconds"])
    middle = dict(ordered[(len(ordered) - 1) // 2])
    middle["seconds_all"] = [r["seconds"] for r in rounds]
    middle["peak_mb_all"] = [r["peak_mb"] for r in rounds]
    return middle


def report(n: int, runs: dict, s_ref: np.ndarray) -> int:
    """Print the table, the ratios and the JSON line."""
    a = runs["analyze"]
    methods = {}
    rounds = len(a["seconds_all"])
    print(f"\n{n} gray {SIDE}x{SIDE} PNG, {MODES} signal modes, k = {K}; median of {rounds} "
          f"round(s), range in brackets")
    print(f"{'method':30s} {'time s':>8s} {'(range)':>14s} {'peak MB':>8s} {'err 1-30':>10s} "
          f"{'err 1-50':>10s}")
    for name, label in LABELS.items():
        r = runs[name]
        errs = relative_errors(r["s"], s_ref) if "s" in r else (None, None)
        methods[name] = {"seconds": r["seconds"], "seconds_all": r["seconds_all"],
                         "process_s": r["process_s"], "peak_mb": r["peak_mb"],
                         "peak_mb_all": r["peak_mb_all"], "max_rel_err_signal": errs[0],
                         "max_rel_err_all": errs[1]}
        for extra in ("decode_s", "svd_s"):
            if extra in r:
                methods[name][extra] = r[extra]
        e1, e2 = ("-" if e is None else f"{e:.1e}" for e in errs)
        spread = f"({min(r['seconds_all']):.2f}-{max(r['seconds_all']):.2f})"
        print(f"{label:30s} {r['seconds']:8.2f} {spread:>14s} {r['peak_mb']:8.0f} {e1:>10s} "
              f"{e2:>10s}")
    s, bound = a["s"], a["bound"]
    tol = 1e-4
    certified = int(np.sum(bound[:MODES] <= tol * s[:MODES]))
    violations = int(np.sum(np.abs(s[:K] - s_ref[:K]) > bound[:K]))
    speedup = runs["ipca"]["seconds"] / a["seconds"]
    floor = a["seconds"] / runs["decode"]["seconds"]
    err_signal = methods["analyze"]["max_rel_err_signal"]
    print(f"\n(a) options: {a['options']}")
    print(f"(a) metadata['refinement']: {a['refinement']}")
    print(f"(a) signal modes certified within {tol:g} by singular_value_error: "
          f"{certified} of {MODES}; modes whose true error exceeds the certified bound: "
          f"{violations} of {K}")
    print(f"speed-up (a) vs (b), medians:        {speedup:6.1f}x   (target >= 10x)")
    print(f"time (a) / decode floor (c), medians: {floor:6.2f}x   (target <= 2x)")
    for i in range(rounds):
        print(f"  round {i + 1}: {runs['ipca']['seconds_all'][i] / a['seconds_all'][i]:.1f}x, "
              f"{a['seconds_all'][i] / runs['decode']['seconds_all'][i]:.2f}x")
    print(f"(a) max rel error, modes 1-{MODES}: {err_signal:.1e}   (target <= 1e-4)")
    line = {
        "benchmark": "bench_exact", "images": n, "side": SIDE, "k": K, "signal_modes": MODES,
        "gap": float(s_ref[MODES - 1] / s_ref[MODES]), "methods": methods,
        "analyze": {"options": a["options"], "refinement": a["refinement"],
                    "certified_signal_modes": certified, "certificate_violations": violations},
        "ratios": {"speedup_vs_ipca": speedup, "time_vs_decode_floor": floor,
                   "max_rel_err_signal": err_signal},
        "targets": {"speedup_vs_ipca": ">= 10", "time_vs_decode_floor": "<= 2",
                    "max_rel_err_signal": "<= 1e-4"},
    }
    print(json.dumps(line))
    return 0


if __name__ == "__main__":
    sys.exit(main())
