"""The analysis on a Dask cluster: the same Decomposition as the local engine, computed by the
cluster's workers one block of files at a time.

Passes over the data (each one reads every file once, on the workers):

1. the first pass makes the mean and a start basis together, one task per block of files:
   each block's thin SVD centred on its own mean, truncated to ``rank + oversample``
   directions, merged pairwise in a tree on the cluster with the mean update of Ross, Lim, Lin
   and Yang (2008); images that do not decode are listed as problems and left out, as the
   local learning pass does. This start is as close as the local engine's streaming pass (both
   truncate the same way), so the refinement passes that follow are as many as locally.
   Alternative (``start="range"``): a mean pass, then the range finder of Halko, Martinsson and
   Tropp (2011, SIAM Review 53, Alg. 4.1/4.3) through ``dask.array.linalg.compression_matrix``
   (the first stage of ``dask.array.linalg.svd_compressed``) on the lazily centred dask array
   of columns (each block is centred in the task that reads it: no centred copy of the data
   is formed), one pass plus two per power iteration;
2. the refinement passes of the local engine (:mod:`modescope.core.engine.passes`): each pass
   computes, per block on the workers, the exact weights, residuals and energies and the block's
   share of ``A A^T U`` with the local engine's own kernel; the shares are summed on the
   cluster in a tree, and the client runs the same Rayleigh-Ritz step and certificate
   (:func:`modescope.core.engine.refine.rayleigh_ritz_step`) and the same stopping rules. The
   first of them is the exact scoring pass.

A refinement pass makes both products of a power iteration from one read of the data, while a
power iteration of the range finder reads it twice: the refinement passes do the iterating (and
certify it).
"""

from __future__ import annotations

import dataclasses
import uuid
from typing import Callable

import numpy as np

from modescope.core.decomposition import Decomposition
from modescope.core.engine.cluster import tasks
from modescope.core.engine.cluster.connect import Waiter, open_client, require_dask
from modescope.core.engine.options import (AnalysisOptions, AnalysisResult, Clock, Progress,
                                           block_size_for, metadata_for)
from modescope.core.engine.passes import (Refined, _excess, _plain, close_pass,
                                          pass_rounding)
from modescope.core.engine.pipeline import _refinement_summary, _scanned
from modescope.core.engine.refine import PassAccumulator
from modescope.core.errors import NoUsableImagesError, SourceError
from modescope.core.sources.decode import analysis_shape
from modescope.core.sources.scan import Problem, SourceSet
from modescope.core.validation import check_choice, check_int

__all__ = ["analyze_on_cluster"]

_FAN_IN = 8     # blocks summed per node of the tree sum; our own choice, no published source


def analyze_on_cluster(sources, options: AnalysisOptions | None = None, *,
                       scheduler: str | None = None, client=None,
                       progress: Callable[[Progress], None] | None = None,
                       cancel: Callable[[], bool] | None = None,
                       start: str = "tree", power_iterations: int = 1,
                       connect_timeout: float = 5.0,
                       local_workers: int = 2, local_processes: bool = True) -> AnalysisResult:
    """Analyse a collection on a Dask cluster (the same result as :func:`.pipeline.analyze`).

    Parameters
    ----------
    sources : sequence of str or path, or SourceSet
        Folders and files, or the result of :func:`.pipeline.scan`. Every worker must see the
        files under the same paths (a shared file system).
    options : AnalysisOptions, optional
        As for the local engine; ``block_size`` is the number of files per task and
        ``workers`` (decoding threads) is not used (each task decodes in one thread).
    scheduler : str, optional
        Address of a running Dask scheduler. Neither this nor ``client``: a local cluster of
        ``local_workers`` workers is started on 127.0.0.1 and closed at the end.
    client : distributed.Client, optional
        An open client to use (left open).
    progress : callable, optional
        Called with a :class:`Progress` as the workers report blocks read (through the
        scheduler): stage "learn" for the mean pass and the start basis, "score" for the
        refinement passes.
    cancel : callable, optional
        Returns True to stop; the tasks running are cancelled. The result is the last
        complete refinement pass, or no decomposition before the first one.
    start : {"tree", "range"}, optional
        How the start basis is made. "tree" (default): in the first pass, with the mean, each
        block's own SVD, merged pairwise in a tree (as accurate as the local engine's streaming
        pass; the whole run then reads the data as often as the local engine does). "range":
        a mean pass, then the range finder of ``dask.array.linalg.svd_compressed`` (Halko,
        Martinsson and Tropp 2011) on the dask array of columns, with ``power_iterations``.
    power_iterations : int, optional
        Power iterations of the "range" start (two passes over the data each; default 1).
    connect_timeout : float, optional
        Seconds to wait for ``scheduler``.
    local_workers : int, optional
        Workers of the local cluster (one thread each).
    local_processes : bool, optional
        Local workers in their own processes (default) or as threads of this process.

    Returns
    -------
    AnalysisResult
        Its decomposition has the fields, bounds and metadata of the local engine's, plus
        ``metadata["engine"]`` describing the cluster run.

    Raises
    ------
    ClusterError
        If dask is not installed (the message names ``modescope[cluster]``), the scheduler
        cannot be reached, or a worker died.
    NoUsableImagesError
        If no image can be decoded.
    SourceError
        If every image changed or became unreadable during the analysis.
    """
    options = AnalysisOptions() if options is None else options
    if not isinstance(options, AnalysisOptions):
        raise TypeError(f"options must be AnalysisOptions, got {type(options).__name__}")
    if scheduler is not None and not isinstance(scheduler, str):
        raise TypeError(f"scheduler must be an address text such as 'tcp://host:8786', got "
                        f"{type(scheduler).__name__}")
    check_choice("start", start, ("tree", "range"))
    power_iterations = check_int("power_iterations", power_iterations, minimum=0, maximum=20)
    local_workers = check_int("local_workers", local_workers, minimum=1, maximum=256)
    if isinstance(connect_timeout, bool) or not isinstance(connect_timeout, (int, float)):
        raise TypeError(f"connect_timeout must be a number of seconds, got {connect_timeout!r}")
    if not connect_timeout > 0:
        raise ValueError(f"connect_timeout must be positive, got {connect_timeout!r}")
    require_dask()
    cancel = cancel or (lambda: False)
    # the cluster first: an unreachable scheduler is reported before a long scan
    with open_client(scheduler, client, connect_timeout=float(connect_timeout),
                     local_workers=local_workers, local_processes=local_processes) as cl:
        source_set = _scanned(sources, options, progress, cancel)
        if source_set is None:
            empty = SourceSet(images=(), reference_size=(0, 0), color=options.color,
                              resize_mismatched=options.resize_mismatched, problems=())
            return AnalysisResult(None, empty, (), True)
        try:
            shape = analysis_shape(source_set, options.downscale)
        except ValueError as exc:                   # a downscale too large for these images
            raise SourceError(str(exc)) from None
        run = _ClusterRun(cl, source_set, options, shape, progress, cancel, start,
                          power_iterations)
        try:
            return run.run(scheduler)
        finally:
            run.waiter.close()


def _parts(used: SourceSet, block: int) -> list[SourceSet]:
    """Cut ``used`` into consecutive blocks of ``block`` images (one task each)."""
    return [dataclasses.replace(used, images=used.images[i:i + block], problems=(), notes=())
            for i in range(0, used.n_images, block)]


class _ClusterRun:
    """One analysis on the cluster: its passes, in order, and the result they make."""

    def __init__(self, client, source_set: SourceSet, options: AnalysisOptions, shape: tuple,
                 progress, cancel, start: str, power_iterations: int):
        self.client, self.source_set, self.options = client, source_set, options
        self.shape, self.progress, self.cancel = shape, progress, cancel
        self.start, self.power_iterations = start, power_iterations
        self.pixels = int(np.prod(shape))
        self.block = block_size_for(options, self.pixels)
        self.problems: list[Problem] = list(source_set.problems)
        self.waiter = Waiter(client, cancel)
        self.reads = 0                        # passes over the data, for the metadata
        self._tags = 0
        self._run_id = uuid.uuid4().hex[:8]    # runs sharing a client count apart

    # -- running one set of tasks ------------------------------------------------------------
    def _tag(self, name: str) -> str:
        self._tags += 1
        return f"{name}-{self._run_id}-{self._tags}"

    def _wait(self, futures, tag: str, stage: str, total: int, detail: str, on_done=None,
              what: str = "a pass over the images") -> bool:
        clock = Clock(stage, total, self.progress, detail)
        ok = self.waiter.wait(futures, tag, report=lambda n: clock.report(min(n, total)),
                              on_done=on_done, what=what)
        if ok:
            clock.report(total)
            self.reads += 1
        return ok

    # -- the passes ----------------------------------------------------------------------------
    def run(self, scheduler: str | None) -> AnalysisResult:
        """Run every pass; return the result (partial when cancelled)."""
        if self.start == "tree":
            used, mean, basis = self._tree_start()
        else:
            used, mean = self._mean_pass()
            basis = None
        if used is None:
            return AnalysisResult(None, self.source_set, tuple(self.problems), True)
        # a fresh key each time (hash=False): a scatter of equal data under the key of a
        # future just released can be dropped by the scheduler with its dependents
        mean_future = self.client.scatter(mean.astype(np.float32), broadcast=True, hash=False)
        if basis is None:
            basis = self._start_basis(used, mean_future)
        if basis is None:
            return AnalysisResult(None, self.source_set, tuple(self.problems), True)
        refined, kept = self._refine(basis, mean, mean_future, used)
        if refined.stopped:
            return AnalysisResult(None, self.source_set, tuple(self.problems), True)
        self.problems.extend(refined.dropped)
        refs = [used.images[i] for i in kept]
        meta = metadata_for(self.options, self.source_set, self.problems, "exact",
                            self.options.rank + self.options.oversample)
        meta["refinement"] = _refinement_summary(refined, self.options)
        meta["engine"] = {"name": "dask", "scheduler": scheduler or "local cluster",
                          "passes_over_data": self.reads,
                          "start": self.start, "power_iterations": self.power_iterations}
        d = Decomposition(
            mean=mean.astype(np.float32), basis=refined.basis,
            singular_values=refined.singular_values, weights=refined.weights,
            total_energy=float(np.sum(refined.energy)), image_shape=self.shape,
            paths=tuple(r.path for r in refs),
            pages=np.array([r.page for r in refs], dtype=np.int32),
            residual=refined.residual, exact=True, marks=None, metadata=meta,
            singular_value_error=refined.error)
        return AnalysisResult(d, self.source_set, tuple(self.problems), refined.interrupted)

    def _tree_start(self):
        """One pass: each block's own SVD on the workers, merged pairwise in a tree on the
        cluster (:func:`.tasks.merge_states`); return (the images that decode, their mean, the
        start basis)."""
        parts = _parts(self.source_set, self.block)
        q = self.options.rank + self.options.oversample
        tag = self._tag("start")
        blocks = self.client.map(tasks.block_svd, parts, downscale=self.options.downscale, q=q,
                                 tag=tag, pure=False)
        notes = [self.client.submit(tasks.pick, b, i, pure=False) for i in (1, 2)
                 for b in blocks]
        states = [self.client.submit(tasks.pick, b, 0, pure=False) for b in blocks]
        while len(states) > 1:
            merged = [self.client.submit(tasks.merge_states, a, b, q, pure=False)
                      for a, b in zip(states[0::2], states[1::2])]
            states = merged + states[len(merged) * 2:]
        del blocks
        n_parts = len(parts)
        ok: list = [None] * n_parts
        final = {}

        def done(i, result):
            if i == 2 * n_parts:
                final["state"] = result
            elif i < n_parts:
                ok[i] = result
            else:
                self.problems.extend(result)
        if not self._wait(notes + states, tag, "learn", self.source_set.n_images,
                          "the mean image and a start basis from per-block SVDs merged in a "
                          "tree, on the Dask cluster", done, "the first pass"):
            return None, None, None
        _, mean, u, _ = final["state"]
        used = self._decoded(np.concatenate(ok))
        return used, mean, np.asfortranarray(u, dtype=np.float32)

    def _decoded(self, ok: np.ndarray) -> SourceSet:
        """The images of the first pass that decoded (NoUsableImagesError when none did)."""
        good = np.flatnonzero(ok)
        if good.size == 0:
            first = "; ".join(str(p) for p in self.problems[:5])
            raise NoUsableImagesError(f"none of the {self.source_set.n_images} images could "
                                      f"be decoded on the Dask workers (each must see the "
                                      f"files under the same paths): {first}")
        return dataclasses.replace(self.source_set, problems=(), notes=(),
                                   images=tuple(self.source_set.images[i] for i in good))

    def _mean_pass(self):
        """Sum the images on the workers; return (the images that decode, their mean)."""
        parts = _parts(self.source_set, self.block)
        tag = self._tag("mean")
        futures = self.client.map(tasks.sum_block, parts, downscale=self.options.downscale,
                                  tag=tag, pure=False)
        total = np.zeros(self.pixels)
        ok = [None] * len(parts)

        def done(i, result):
            block_sum, block_ok, block_problems = result
            total.__iadd__(block_sum)
            ok[i] = block_ok
            self.problems.extend(block_problems)
        if not self._wait(futures, tag, "learn", self.source_set.n_images,
                          "the mean image, on the Dask cluster", done, "the mean pass"):
            return None, None
        used = self._decoded(np.concatenate(ok))
        return used, total / used.n_images

    def _start_basis(self, used: SourceSet, mean_future) -> np.ndarray | None:
        """Range finder (Halko et al. 2011) on the lazily centred dask array of columns."""
        import dask
        import dask.array as da
        from dask.array.linalg import compression_matrix

        tag = self._tag("start")
        columns = [da.from_delayed(
            dask.delayed(tasks.centred_block, pure=False)(part, self.options.downscale,
                                                          mean_future, tag),
            shape=(self.pixels, part.n_images), dtype=np.float32)
            for part in _parts(used, self.block)]
        centred = da.concatenate(columns, axis=1)
        with self.client.as_current():
            comp = compression_matrix(centred, self.options.rank,
                                      n_power_iter=self.power_iterations,
                                      n_oversamples=self.options.oversample, seed=0,
                                      compute=self.power_iterations > 0)
            future = self.client.compute(comp)
        result = {}
        reads = 1 + 2 * self.power_iterations
        if not self._wait([future], tag, "learn", used.n_images * reads,
                          "a random start basis (Halko, Martinsson and Tropp 2011), on the "
                          "Dask cluster", lambda i, r: result.setdefault("q", r),
                          "the start basis"):
            return None
        self.reads += reads - 1
        return np.asfortranarray(np.asarray(result["q"], dtype=np.float32).T)

    def _pass(self, basis: np.ndarray, mean_future, used: SourceSet, number: int):
        """One refinement pass on the cluster; return (accumulator or None, failed indices)."""
        options = self.options
        parts = _parts(used, self.block)
        tag = self._tag("score")
        basis32 = np.asfortranarray(basis, dtype=np.float32)
        basis_future = self.client.scatter(basis32, broadcast=True, hash=False)
        blocks = self.client.map(tasks.project_block_sums, parts, downscale=options.downscale,
                                 basis=basis_future, mean=mean_future, want_y=options.refine,
                                 tag=tag, pure=False)
        small = [self.client.submit(tasks.pick, b, 0, pure=False) for b in blocks]
        small += [self.client.submit(tasks.pick, b, 2, pure=False) for b in blocks]
        small += [self.client.submit(tasks.pick, b, 3, pure=False) for b in blocks]
        yts = [self.client.submit(tasks.pick, b, 1, pure=False) for b in blocks]
        while len(yts) > 1:
            yts = [self.client.submit(tasks.add_arrays, *yts[i:i + _FAN_IN], pure=False)
                   for i in range(0, len(yts), _FAN_IN)]
        del blocks
        acc = PassAccumulator(basis32, np.zeros(self.pixels, dtype=np.float32), used.n_images,
                              want_y=False)
        starts = np.cumsum([0] + [p.n_images for p in parts])
        n_parts = len(parts)
        failed: list[int] = []
        found: list[Problem] = []
        yt = {}

        def done(i, result):
            if i == 3 * n_parts:
                yt["sum"] = result
                return
            kind, j = divmod(i, n_parts)
            sl = slice(starts[j], starts[j + 1])
            if kind == 0 and result is not None:
                acc.weights[:, sl], acc.residual[sl], acc.energy[sl] = result
            elif kind == 1:
                found.extend(result)
            elif kind == 2:
                failed.extend(int(starts[j] + k) for k in np.flatnonzero(~result))
        detail = (f"pass {number} of at most {options.max_passes}, on the Dask cluster"
                  if options.refine else "on the Dask cluster")
        if not self._wait(small + yts, tag, "score", used.n_images, detail, done,
                          f"refinement pass {number}"):
            return None, [], []
        if failed:
            return None, failed, found
        acc.yt = yt.get("sum")
        acc.done = used.n_images
        return acc, [], []

    def _refine(self, basis, mean, mean_future, used: SourceSet):
        """The local engine's refinement loop (:func:`.passes.refine`), passes on the cluster."""
        options, rank = self.options, self.options.rank
        kept = np.arange(used.n_images)
        last_kept, last, energy, dropped = kept, None, None, []
        passes, rounding, interrupted = 0, 0.0, False
        while passes < (options.max_passes if options.refine else 1):
            acc, failed, found = self._pass(basis, mean_future, used, passes + 1)
            if failed:                           # files changed since the mean pass
                dropped.extend(_dropped_now(found))
                bad = set(failed)
                keep = [i for i in range(used.n_images) if i not in bad]
                used = dataclasses.replace(used, images=tuple(used.images[i] for i in keep))
                kept = kept[keep]
                if used.n_images == 0:
                    raise SourceError("every image changed or became unreadable during the "
                                      f"analysis: {dropped[0]}")
                continue
            if acc is None:
                interrupted = last is not None
                break
            passes += 1
            energy = acc.energy
            if not options.refine:
                plain = _plain(acc, rank, passes)
                return dataclasses.replace(plain, dropped=tuple(dropped)), kept
            if passes == 1:
                rounding = pass_rounding(acc, mean, used.n_images)
            previous = None if last is None else _excess(last, rank, options.tolerance)
            last = None                   # free the previous pass's arrays before the next
            last, stop = close_pass(acc, previous, rounding, options, passes)
            last_kept = kept
            del acc
            if stop:
                break
            basis = last.next_basis()
        if last is None:
            return Refined(None, None, None, None, None, None, passes, True), kept
        b, s, w, res, err = last.truncate(rank)
        return Refined(b, s, w, res, err, energy, passes, False, interrupted,
                       None, tuple(dropped)), last_kept


def _dropped_now(problems) -> list[Problem]:
    return [Problem(p.path, f"changed or became unreadable during the analysis ({p.reason}); "
                            "left out of the result (the mean image still counts it as first "
                            "read)", p.page) for p in problems]
