r"""Reanalysis of logged frames: per-frame inversion or Kalman smoothing, resumable, local or Dask.

``run_batch`` reads the log in chunks (bounded memory), gives every input frame one row in
``frames.<fmt>`` (``time, frame, status, reason, n_used, centre_mean, centre_sd, chi2``) and
writes ``query.<fmt>`` (``time, label, mean, sd, lower, upper``) for the frames with an estimate.
``frame`` is the record number in the log; ``centre_mean``/``centre_sd`` are the mean level
:math:`a_0` (the value at the centre); ``chi2`` is the whitened residual sum of squares of the
frame's fit (static) or its normalised innovation squared :math:`v^\top S^{-1}v` (assimilation).

Static mode
    Each frame is the Tikhonov fit with fixed parameters (``Tikhonov(rule="fixed", lam=...,
    noise_sd=...)``). For fixed parameters the posterior mean is linear in the observed readings,
    :math:`\bar u_q = H_q M_P y_o`, and the sds do not depend on them, so frames that share a
    drop-out pattern :math:`P` share one factorisation: :math:`H_q M_P` and the sds are computed
    once per pattern from the same standard-form SVD as ``rim-invert fit``
    (:class:`~invert.stages._spectrum.Spectrum`), and the work per frame is a matrix product,
    vectorised over the frames of a chunk: the new patterns of a chunk are factorised together
    (one stacked SVD per number of readings), the chunk's most common pattern is applied to all
    its frames in one product and every other pattern to its own rows. The next chunk is read
    and parsed in a background thread meanwhile (one chunk ahead). Parameters are given
    (``lam``, ``noise_sd``, e.g. from a fit's summary.json) or estimated once on the log by
    maximising the evidence pooled over a sample of frames with the most common pattern (Bishop
    2006, §3.5).
Assimilation
    Kalman filter and RTS smoother over the coefficients (:mod:`invert.stages.assimilate.core`); the
    filtered segments are spilled to disk so memory stays bounded.

Frame statuses: ``ok``; ``no-data`` (no reading; in assimilation the frame still gets the
smoothed estimate); ``rejected`` with a reason (duplicate time, time out of order, non-numeric or
non-finite cell, unparseable or missing time, malformed row, fewer than 2 readings in static
mode). Times must increase; a frame whose time is not after the last accepted one is rejected.

Resume: chunk outputs are written as part files (temporary file, then ``os.replace``; Arrow
IPC for a Parquet output, merged into the final file at the end) under ``OUT/.batch-work`` with a
manifest updated the same way after each chunk; a rerun with ``resume=True`` continues after the
last completed chunk, and the merged result is identical.

References
----------
.. [1] C. M. Bishop, *Pattern Recognition and Machine Learning*, Springer, 2006, §3.5.
.. [2] S. Särkkä, *Bayesian Filtering and Smoothing*, Cambridge University Press, 2013.
"""

from __future__ import annotations

import hashlib
import json
import os
import pickle
import shutil
import sys
import threading
import time as _time
from collections import OrderedDict
from pathlib import Path

import numpy as np
from scipy import optimize, stats

from ..io import logs as bio
from .._validation import check_level
from ..errors import InputError
from ..report.files import CAUTIONS, to_jsonable
from ..prior import SmoothnessPrior
from ..problem import LinearProblem
from ..stages._spectrum import Spectrum

__all__ = ["run_batch", "StaticInverter", "pooled_evidence_fit", "frame_statuses"]

#: Test-only: seconds to sleep after each chunk, so a test can kill a run part-way.
_DELAY_ENV = "RIM_INVERT_TEST_CHUNK_DELAY"
_WORK = ".batch-work"
#: New patterns factorised per stacked call (bounds the temporary arrays).
_FACTOR_BLOCK = 256
_STATUSES = ("ok", "no-data", "rejected")
_STATUS_NAMES = np.array(_STATUSES, dtype=object)


# --- statuses ----------------------------------------------------------------------------------
def frame_statuses(chunk, last_time, *, min_readings=1):
    """Status of each frame of a chunk, given the last accepted time before it.

    Returns
    -------
    status : ndarray of str
    reason : ndarray of object
    accepted : ndarray of bool
        Frames with a usable time (ok or no-data).
    last_time : float
        Last accepted time after the chunk.
    """
    reason = chunk.reason.copy()
    valid = np.equal(reason, None).astype(bool)
    t = chunk.t
    # a valid frame is accepted iff its time exceeds every earlier valid time (rejected ones
    # never raise the running maximum, since they do not exceed it)
    prior = np.where(valid, t, -np.inf)
    run = np.maximum.accumulate(np.concatenate([[last_time], prior]))[:-1]
    dup = valid & (t == run)
    back = valid & (t < run)
    reason[dup] = "duplicate time"
    reason[back] = "time out of order (earlier than a previous frame)"
    accepted = valid & ~dup & ~back
    n_used = np.isfinite(chunk.Y).sum(axis=1)
    few = accepted & (n_used > 0) & (n_used < min_readings)
    for i in np.flatnonzero(few):
        reason[i] = f"only {n_used[i]} reading(s); a fit needs at least {min_readings}"
    code = np.where(accepted & ~few, np.where(n_used > 0, 0, 1), 2)
    status = _STATUS_NAMES[code]
    accepted &= ~few
    new_last = float(np.max(t[accepted])) if accepted.any() else last_time
    return status, reason, accepted, max(new_last, last_time)


# --- static inversion ----------------------------------------------------------------------------
class StaticInverter:
    r"""Per-frame Tikhonov inversion with fixed parameters, one factorisation per pattern.

    Parameters
    ----------
    domain : Disk
    points : ndarray of shape (n_sensors, 2)
        Sensor positions in layout order.
    sigma : ndarray of shape (n_sensors,) or None
        Per-sensor noise sd (known noise) or None (common level ``noise_sd``).
    lam : float
        Regularisation parameter :math:`\alpha`.
    noise_sd : float or None
        Common noise sd when ``sigma`` is None.
    query : ndarray of shape (n_query, 2)
    s : float, default=2.0
    level : float, default=0.9
    max_patterns : int, default=50000
        Size of the pattern cache (least recently used patterns are dropped); lowered so that
        the cache holds at most ``cache_bytes``.
    cache_bytes : int, default=256 MiB
        Memory budget of the pattern cache (one entry is a ``(n_query + 1 + n_sensors) x
        n_sensors`` matrix of float64).

    Notes
    -----
    For the observed set :math:`o` of a pattern, with :math:`W_o = \operatorname{diag}(1/
    \sigma_o)`, prior sd pattern :math:`D` and the SVD :math:`W_oG_oD = U\,\mathrm{diag}(s)V^\top`,
    the coefficients are :math:`c = D V \operatorname{diag}(f/s) U^\top W_o y_o = M y_o` with
    :math:`f = s^2/(s^2+\alpha)` and the covariance is that of :meth:`Spectrum.cov`; the whitened
    residual is :math:`W_o(I - G_oM)y_o`, so :math:`\chi^2 = \|W_o(I-G_oM)y_o\|^2/\sigma^2`.
    """

    def __init__(self, domain, points, sigma, lam, noise_sd, query, *, s=2.0, level=0.9,
                 max_patterns=50000, cache_bytes=256 * 2**20):
        self.domain = domain
        self.points = np.asarray(points, float)
        self.sigma = None if sigma is None else np.asarray(sigma, float)
        self.lam = float(lam)
        self.noise_sd = noise_sd
        self.noise_var = 1.0 if sigma is not None else float(noise_sd) ** 2
        self.query = np.asarray(query, float)
        self.s = s
        self.level = level
        self.z = float(stats.norm.ppf((1 + level) / 2))
        self.G = domain.design(self.points)
        # checked once here: the layout as a LinearProblem (positive sigma, shapes)
        LinearProblem(self.G, np.zeros(len(self.G)), self.sigma, domain.degrees,
                      domain.eigenvalues, domain)
        self.Hq = domain.design(self.query)
        self.prior_sd = np.sqrt(SmoothnessPrior(s=s).shape(domain.eigenvalues, domain.degrees))
        n = len(self.points)
        entry = 8 * ((len(self.query) + 1 + n) * n + len(self.query) + 1)
        self.max_patterns = int(max(1, min(max_patterns, cache_bytes // entry)))
        self._cache = OrderedDict()
        self._lock = threading.Lock()
        self.n_factorised = 0

    def __getstate__(self):
        d = dict(self.__dict__)
        d["_cache"], d["_lock"] = OrderedDict(), None
        return d

    def __setstate__(self, d):
        self.__dict__.update(d)
        self._lock = threading.Lock()

    def _factorise(self, obs):
        """Matrices and sds of the patterns ``obs`` (bool rows), all with the same count.

        The patterns are stacked and factorised together (numpy's SVD over a stack: the same
        LAPACK driver per matrix as :class:`Spectrum`, one call), and every product after it
        is a stacked product, so there is no Python work per pattern.
        """
        b, n = obs.shape
        m = int(obs[0].sum())
        d = self.prior_sd
        p = len(d)
        nq = len(self.Hq)
        lam = self.lam
        idx = np.nonzero(obs)[1].reshape(b, m)
        w = np.ones((b, m)) if self.sigma is None else 1.0 / self.sigma[idx]
        # Spectrum's standard form (same SVD driver, same rank cut-off), only the parts needed
        if m:
            U, sv, Vt = np.linalg.svd((w[:, :, None] * self.G[idx]) * d, full_matrices=True)
        else:
            U, sv, Vt = np.empty((b, 0, 0)), np.empty((b, 0)), np.broadcast_to(np.eye(p),
                                                                                (b, p, p))
        r = sv.shape[1]
        keep = sv > sv[:, :1] * 1e-13          # the rank cut-off k (a prefix: sv descends)
        s2 = sv**2
        f = np.where(keep, s2 / (s2 + lam), 0.0)
        g = np.divide(f, sv, out=np.zeros_like(f), where=keep)
        Ur = U[:, :, :r]
        # c = D V diag(f/s) U^T W y  (Spectrum.coef written as a matrix acting on y)
        Vr = np.swapaxes(Vt[:, :r, :], 1, 2)
        Mc = ((d[:, None] * Vr) * g[:, None, :]) @ (np.swapaxes(Ur, 1, 2) * w[:, None, :])
        Mq = self.Hq @ Mc
        # covariance B diag(h) B^T with B = D V (full V), h = 1/(s^2 + lam) on the range and
        # 1/lam on the null space (Spectrum.cov_factor): variances as weighted row sums
        B = d[:, None] * np.swapaxes(Vt, 1, 2)
        h = np.concatenate([np.where(keep, 1.0 / (s2 + lam), 1.0 / lam),
                            np.full((b, p - r), 1.0 / lam)], axis=1)
        HB = self.Hq @ B
        qsd = np.sqrt(self.noise_var * np.einsum("bqp,bp->bq", HB**2, h))
        c0sd = np.sqrt(self.noise_var * np.einsum("bp,bp->b", B[:, 0] ** 2, h))
        # whitened residual W(I - G M) y = (I - U diag(f) U^T) W y
        Rw = (np.eye(m) - (Ur * f[:, None, :]) @ np.swapaxes(Ur, 1, 2)) * w[:, None, :]
        # one matrix acting on the full reading vector (zeros at missing sensors):
        # rows = query means, mean level, whitened residuals (padded to n_sensors rows)
        cols = np.concatenate([Mq, Mc[:, :1], Rw, np.zeros((b, n - m, m))], axis=1)
        A = np.zeros((b, nq + 1 + n, n))
        A[np.arange(b)[:, None], :, idx] = np.swapaxes(cols, 1, 2)
        return A, np.concatenate([qsd, c0sd[:, None]], axis=1)

    def _entries(self, packed, obs):
        """(matrix, sds) of each pattern; ``packed``/``obs``: one row per distinct pattern."""
        keys = [row.tobytes() for row in packed]
        with self._lock:
            got = [self._cache.get(k) for k in keys]
        new = [i for i, e in enumerate(got) if e is None]
        if new:
            count = obs[new].sum(axis=1)
            for m in np.unique(count):
                sel = [new[j] for j in np.flatnonzero(count == m)]
                for a in range(0, len(sel), _FACTOR_BLOCK):
                    part = sel[a:a + _FACTOR_BLOCK]
                    A, sd = self._factorise(obs[part])
                    for j, i in enumerate(part):
                        got[i] = (A[j], sd[j])
        with self._lock:
            for k in keys:  # least recently used patterns go first when the cache is full
                if k in self._cache:
                    self._cache.move_to_end(k)
            for i in new:
                self._cache[keys[i]] = got[i]
            self.n_factorised += len(new)
            while len(self._cache) > self.max_patterns:
                self._cache.popitem(last=False)
        return got

    def solve(self, Y):
        """Estimates for frames ``Y`` (rows with at least one reading).

        Frames are grouped by drop-out pattern (one ``np.unique`` over the packed bit rows);
        new patterns are factorised together (:meth:`_factorise`); the pattern shared by most
        frames is applied to the whole block in one matrix product and the other patterns,
        each on its own rows, overwrite theirs.

        Returns
        -------
        qmean, qsd : ndarray of shape (n_frames, n_query)
        centre_mean, centre_sd, chi2 : ndarray of shape (n_frames,)
        """
        Y = np.asarray(Y, float)
        L, n = Y.shape
        nq = len(self.query)
        nr = nq + 1 + n
        obs = np.isfinite(Y)
        Yz = np.where(obs, Y, 0.0)
        packed = np.packbits(obs, axis=1)
        codes = _pattern_codes(packed)
        _, first, inverse, counts = np.unique(codes, return_index=True, return_inverse=True,
                                              return_counts=True)
        inverse = inverse.ravel()
        entries = self._entries(packed[first], obs[first])
        out = np.empty((L, nr))
        top = int(np.argmax(counts)) if L else 0
        if L and counts[top] * 4 >= L:
            # the common pattern on every frame (cheaper than gathering its rows out)
            np.matmul(Yz, entries[top][0].T, out=out)
            order = np.argsort(inverse, kind="stable")
            order = order[inverse[order] != top]
        else:
            order = np.argsort(inverse, kind="stable")
        if len(order):
            # the other frames sorted by pattern: one row gather, one product per pattern
            Ys = Yz[order]
            res = np.empty((len(order), nr))
            a = 0
            for g in np.unique(inverse[order]):
                b = a + counts[g]
                np.matmul(Ys[a:b], entries[g][0].T, out=res[a:b])
                a = b
            out[order] = res
        sds = np.array([e[1] for e in entries]).reshape(len(entries), nq + 1)[inverse]
        chi2 = np.einsum("ij,ij->i", out[:, nq + 1:], out[:, nq + 1:]) / self.noise_var
        return out[:, :nq], sds[:, :nq], out[:, nq], sds[:, nq], chi2


def _pattern_codes(packed):
    """One integer per row identifying its drop-out pattern (``packed``: rows of packed bits)."""
    nb = packed.shape[1]
    if nb <= 8:
        pad = np.zeros((len(packed), 8), np.uint8)
        pad[:, :nb] = packed
        return pad.view(np.uint64).ravel()
    # wider layouts: the index of the row among the distinct rows
    _, inv = np.unique(packed, axis=0, return_inverse=True)
    return inv.ravel().astype(np.uint64)


def pooled_evidence_fit(G, Y, sigma, prior_sd, *, n_grid=200):
    r"""Regularisation parameter (and noise sd) maximising the evidence pooled over frames.

    All frames share one design ``G`` (one drop-out pattern). With the standard-form SVD of
    :class:`~invert.stages._spectrum.Spectrum`, frame :math:`j` has
    :math:`q_j(\alpha) = \sum_i \beta_{ij}^2/g_i + r_{\perp j}`, :math:`g_i = 1 + s_i^2/\alpha`;
    the pooled log-evidence is :math:`-\frac12\sum_j (q_j + \log|C|)` with known noise, and with
    one unknown noise level :math:`\hat\sigma^2 = \sum_j q_j/(nm)` profiled out (Bishop 2006,
    §3.5; the per-frame form is :meth:`Spectrum.log_evidence`).

    Returns
    -------
    lam : float
    noise_sd : float or None
        None when ``sigma`` is given.
    """
    G = np.asarray(G, float)
    Y = np.atleast_2d(np.asarray(Y, float))
    n, m = Y.shape
    problem = LinearProblem(G, Y[0], sigma, np.zeros(G.shape[1]), np.zeros(G.shape[1]))
    spec = Spectrum(problem, prior_sd)
    w = problem.weights
    Yt = Y * w[None, :]
    B = spec.U.T @ Yt.T                       # (k, n)
    rperp = np.sum((Yt.T - spec.U @ B) ** 2, axis=0)
    known = sigma is not None

    def score(alpha):
        alpha = np.atleast_1d(alpha)
        g = 1 + spec.s[:, None] ** 2 / alpha[None, :]
        quad = np.einsum("kn,ka->a", B**2, 1 / g) + rperp.sum()
        logdet = np.sum(np.log(g), axis=0)
        if known:
            return -0.5 * (quad + n * logdet)
        return -0.5 * (n * m * np.log(quad / (n * m)) + n * logdet)

    grid = spec.alpha_grid(n_grid)
    sc = score(grid)
    i = int(np.argmax(sc))
    lo, hi = np.log(grid[max(i - 1, 0)]), np.log(grid[min(i + 1, n_grid - 1)])
    res = optimize.minimize_scalar(lambda la: -score(np.exp(la))[0], bounds=(lo, hi),
                                   method="bounded", options={"xatol": 1e-8})
    alpha = float(np.exp(res.x)) if -res.fun >= sc[i] else float(grid[i])
    if known:
        return alpha, None
    g = 1 + spec.s**2 / alpha
    quad = float(np.sum(B**2 / g[:, None]) + rperp.sum())
    return alpha, float(np.sqrt(quad / (n * m)))


# --- helpers -----------------------------------------------------------------------------------
def _progress(total=None):
    from tqdm.auto import tqdm

    return tqdm(total=total, unit="frame", unit_scale=True, disable=not sys.stderr.isatty(),
                desc="batch", smoothing=0.1)


def _time_array(t, kind):
    import pyarrow as pa

    if kind == "datetime":
        ns = np.where(np.isfinite(t), np.round(np.nan_to_num(t) * 1e9), 0).astype(np.int64)
        return bio.arrow_numbers(ns, pa.timestamp("ns", "UTC"), mask=~np.isfinite(t))
    return bio.arrow_numbers(t, pa.float64(), mask=~np.isfinite(t))


def _frames_table(chunk, status, reason, n_used, cmean, csd, chi2, kind):
    import pyarrow as pa

    def col(v):
        return bio.arrow_numbers(v, pa.float64(), mask=~np.isfinite(v))

    return pa.table({
        "time": _time_array(chunk.t, kind),
        "frame": bio.arrow_numbers(chunk.frame, pa.int64()),
        "status": _status_array(status),
        "reason": _reason_array(reason),
        "n_used": bio.arrow_numbers(n_used, pa.int64()),
        "centre_mean": col(cmean),
        "centre_sd": col(csd),
        "chi2": col(chi2),
    })


def _status_array(status):
    import pyarrow as pa

    codes = np.zeros(len(status), np.int8)
    codes[status == "no-data"] = 1
    codes[status == "rejected"] = 2
    return pa.DictionaryArray.from_arrays(bio.arrow_numbers(codes, pa.int8()),
                                          bio.arrow_strings(_STATUSES))


def _reason_array(reason):
    import pyarrow as pa

    has = ~np.equal(reason, None).astype(bool)
    if not has.any():
        return pa.nulls(len(reason), type=pa.string())
    return bio.arrow_strings(reason)


def _query_table(t, labels, qmean, qsd, z, kind):
    import pyarrow as pa

    L, nq = qmean.shape
    tt = np.repeat(t, nq)
    lab = pa.DictionaryArray.from_arrays(
        bio.arrow_numbers(np.tile(np.arange(nq, dtype=np.int32), L), pa.int32()),
        bio.arrow_strings([str(x) for x in labels]))
    m, s = qmean.ravel(), qsd.ravel()
    f64 = pa.float64()
    return pa.table({"time": _time_array(tt, kind), "label": lab,
                     "mean": bio.arrow_numbers(m, f64), "sd": bio.arrow_numbers(s, f64),
                     "lower": bio.arrow_numbers(m - z * s, f64),
                     "upper": bio.arrow_numbers(m + z * s, f64)})


def _empty_query(kind):
    return _query_table(np.empty(0), ["x"], np.empty((0, 1)), np.empty((0, 1)), 1.0, kind)


def _release_memory():
    """Hand memory that Arrow's allocator keeps cached back to the system (flat memory)."""
    import pyarrow as pa

    pa.default_memory_pool().release_unused()


def _prefetch(iterable, depth=1):
    """Iterate over ``iterable`` in a background thread, at most ``depth`` items ahead.

    Used for the log reader: the next chunk is parsed (pyarrow's threads, which release the
    GIL) while this one is solved and written. Memory stays bounded (``depth`` chunks waiting);
    an error of the reader is raised here, in the consuming thread.
    """
    import queue

    q = queue.Queue(maxsize=depth)
    stop = threading.Event()
    end = object()

    def put(item):
        while not stop.is_set():
            try:
                q.put(item, timeout=0.05)
                return True
            except queue.Full:
                continue
        return False

    def produce():
        try:
            for item in iterable:
                if not put((None, item)):
                    return
            put((None, end))
        except BaseException as exc:  # noqa: BLE001 - handed to the consumer
            put((exc, None))

    worker = threading.Thread(target=produce, name="batch-reader", daemon=True)
    worker.start()
    try:
        while True:
            exc, item = q.get()
            if exc is not None:
                raise exc
            if item is end:
                return
            yield item
    finally:
        stop.set()
        worker.join()


def _sleep_for_tests():
    d = os.environ.get(_DELAY_ENV)
    if d:
        _time.sleep(float(d))


# --- the job -----------------------------------------------------------------------------------
class _Work:
    """The resumable working folder: part files, spilled segments and the manifest."""

    def __init__(self, out, signature, resume):
        self.out = Path(out)
        self.dir = self.out / _WORK
        self.signature = signature
        man = self.dir / "manifest.json"
        self.manifest = None
        if resume and man.exists():
            with open(man) as fh:
                m = json.load(fh)
            if m.get("signature") != signature:
                raise ValueError(f"{self.dir}: the interrupted run used another log or other "
                                 f"options; rerun without --resume to start afresh")
            self.manifest = m
        else:
            shutil.rmtree(self.dir, ignore_errors=True)
        self.dir.mkdir(parents=True, exist_ok=True)
        if self.manifest is None:
            self.manifest = {"signature": signature, "done": {}, "hyper": None}
            self.save()

    def save(self):
        bio.write_json(to_jsonable(self.manifest), self.dir / "manifest.json")

    def part(self, name, i, fmt):
        # Parquet outputs are merged from Arrow IPC parts (cheap to write, memory-mapped when
        # merged); CSV parts are concatenated as text
        return self.dir / f"{name}-{i:06d}.{'arrow' if fmt == 'parquet' else fmt}"

    def dump(self, obj, name):
        path = self.dir / name
        tmp = path.with_name(f".{path.name}.tmp")
        with open(tmp, "wb") as fh:
            pickle.dump(obj, fh, protocol=pickle.HIGHEST_PROTOCOL)
        os.replace(tmp, path)

    def load(self, name):
        with open(self.dir / name, "rb") as fh:
            return pickle.load(fh)


def run_batch(log, layout, *, radius, out, query=None, assimilate=False, engine="local",
              scheduler=None, fmt="parquet", resume=False, lam=None, noise_sd=None,
              level=0.9, smoothness=2.0, n_modes=None, center=None, time_scale=None,
              chunk_rows=65536, steady_tol=1e-10, max_transient=50, calibration_frames=2000,
              ml_frames=20000, n_workers=2, say=print):
    """Reanalyse a log of frames; write frames.<fmt>, query.<fmt> and summary.json into ``out``.

    Parameters
    ----------
    log : str or Path
        CSV or Parquet log (time column + one column per sensor).
    layout : str or Path
        LAYOUT.csv: ``sensor,x,y[,sigma]``.
    radius : float
    out : str or Path
    query : str or Path, optional
        POINTS.csv; default the centre of the disk (label ``centre``).
    assimilate : bool, default=False
        Kalman filter + RTS smoother instead of per-frame inversion.
    engine : {"local", "dask"}
    scheduler : str, optional
        Address of an existing dask scheduler (else a loopback LocalCluster is started).
    fmt : {"parquet", "csv"}
    resume : bool
        Continue an interrupted run in ``out``.
    lam, noise_sd : float, optional
        Fixed parameters (as ``rim-invert fit --lam --noise-sd``); estimated on the log when
        ``lam`` is None.
    time_scale : float, optional
        Fix the time scale of the dynamics (assimilation); else maximum likelihood.
    chunk_rows : int
        Frames per chunk.
    steady_tol, max_transient :
        Steady-state shortcut of the smoother (:func:`~invert.stages.assimilate.core.filter_segment`):
        after ``max_transient`` exact steps with an unchanged drop-out pattern and time step
        the gain jumps to its steady state; ``max_transient=None`` keeps every step exact to
        ``steady_tol`` (slower when the time scale is long). bench/bench_assimilate.py prints
        the difference.

    Returns
    -------
    dict
        The summary written to summary.json.
    """
    from .. import workflow
    from ..io.readings import load_layout, load_points

    level = check_level(level, where="batch")
    if engine not in ("local", "dask"):
        raise ValueError(f"The 'engine' parameter of batch must be one of ('local', 'dask'). "
                         f"Got {engine!r} instead.")
    if fmt not in ("parquet", "csv"):
        raise ValueError(f"The 'format' parameter of batch must be one of ('csv', 'parquet'). "
                         f"Got {fmt!r} instead.")
    if noise_sd is not None and lam is None:
        raise ValueError("--noise-sd goes with --lam (both fixed, e.g. from a fit summary)")
    sensors, points, sigma, _ = load_layout(layout)
    domain = workflow.make_domain(radius, center, s=smoothness, n_modes=n_modes)
    try:
        domain.locate(points)
    except Exception as exc:  # DomainError names the index
        i = getattr(exc, "index", 0) or 0
        raise InputError(Path(layout).name, str(exc), row=i + 2) from None
    if query is not None:
        qpts, qlabels, qrows = load_points(query)
        try:
            domain.locate(qpts)
        except Exception as exc:
            i = getattr(exc, "index", 0) or 0
            raise InputError(Path(query).name, str(exc), row=int(qrows[i])) from None
    else:
        qpts, qlabels = np.array([list(domain.center)]), np.array(["centre"])
    if lam is not None and sigma is None and noise_sd is None:
        raise ValueError("--lam needs --noise-sd when the layout has no 'sigma' column")
    reader = bio.LogReader(log, sensors, chunk_rows=chunk_rows)
    options = {
        "layout": hashlib.sha256(Path(layout).read_bytes()).hexdigest(),
        "query": None if query is None else hashlib.sha256(Path(query).read_bytes()).hexdigest(),
        "radius": radius, "center": list(domain.center), "n_modes": domain.n_modes,
        "s": smoothness, "lam": lam, "noise_sd": noise_sd, "assimilate": bool(assimilate),
        "time_scale": time_scale, "fmt": fmt, "chunk_rows": chunk_rows, "level": level,
        "steady_tol": steady_tol, "max_transient": max_transient, "parts": "arrow-ipc",
    }
    signature = {"log": bio.log_signature(log), "options": options}
    out = Path(out)
    work = _Work(out, signature, resume)
    t_start = _time.perf_counter()
    ctx = {"reader": reader, "domain": domain, "points": points, "sigma": sigma,
           "sensors": sensors, "qpts": qpts, "qlabels": qlabels, "level": level,
           "s": smoothness, "fmt": fmt, "work": work, "lam": lam, "noise_sd": noise_sd,
           "calibration_frames": calibration_frames, "engine": engine,
           "scheduler": scheduler, "n_workers": n_workers}
    client = cluster = None
    if engine == "dask":
        client, cluster = _dask_client(scheduler, n_workers)
    limits = _one_blas_thread()
    try:
        ctx["client"] = client
        hyper = _hyperparameters(ctx)
        if assimilate:
            from ..stages.assimilate.core import CoefficientDynamics

            noise_var = sigma**2 if sigma is not None else np.full(len(sensors),
                                                                 hyper["noise_sd"] ** 2)
            tau2 = (1.0 if sigma is not None else hyper["noise_sd"] ** 2) / hyper["lam"]
            shape = SmoothnessPrior(s=smoothness).shape(domain.eigenvalues, domain.degrees)
            model = CoefficientDynamics.from_prior(domain.design(points), noise_var, shape,
                                                   domain.degrees, tau2=tau2, time_scale=1.0)
            from . import assimilation as _batch_assim

            extra = _batch_assim.run(ctx, model, time_scale, steady_tol, ml_frames,
                                     max_transient)
        else:
            extra = _run_static(ctx, hyper)
        n_chunks = work.manifest["n_chunks"]
        counts = work.manifest["counts"]
        _merge(work, n_chunks, out, fmt, reader.time_kind or "number")
    finally:
        if limits is not None:
            limits.restore_original_limits()
        if client is not None:
            client.close()
        if cluster is not None:
            cluster.close()
    elapsed = _time.perf_counter() - t_start
    summary = {
        "command": "batch",
        "method": "kalman-smoother" if assimilate else "tikhonov (fixed per frame)",
        "engine": engine,
        "log": str(Path(log).name),
        "format": fmt,
        "level": level,
        "lam": hyper["lam"],
        "noise_sd": hyper["noise_sd"],
        "s": smoothness,
        "hyperparameters": hyper["how"],
        "domain": domain.describe(),
        "sensors": {"n": len(sensors), "missing_from_log": reader.missing_sensors,
                    "sigma": "given per sensor" if sigma is not None else "common (noise_sd)"},
        "frames": {"total": int(sum(counts.values())), **{k: int(v) for k, v in counts.items()}},
        "rejections": work.manifest.get("reasons", {}),
        "query_labels": [str(x) for x in qlabels],
        "seconds": elapsed,
        **extra,
        "warnings": ([f"sensor(s) {', '.join(reader.missing_sensors)} of the layout have no "
                      f"column in the log; treated as always missing"]
                     if reader.missing_sensors else []),
        "cautions": list(CAUTIONS),
    }
    summary = to_jsonable(summary)
    bio.write_json(summary, out / "summary.json")
    shutil.rmtree(work.dir, ignore_errors=True)
    return summary


def _one_blas_thread():
    """Limit BLAS to one thread for the run (threadpoolctl, a scikit-learn dependency).

    The products here are small (tens of columns) and many; on a busy machine a multithreaded
    BLAS spends more time waking its threads than computing, and the log reader's threads
    already use the other cores. Measured: per-chunk solve about twice as fast.
    """
    try:
        from threadpoolctl import threadpool_limits
    except ImportError:  # pragma: no cover - scikit-learn brings it
        return None
    return threadpool_limits(limits=1, user_api="blas")


def _dask_client(scheduler, n_workers):
    from dask.distributed import Client, LocalCluster

    if scheduler:
        return Client(scheduler), None
    # in-process workers talking over loopback TCP only (nothing listens beyond this host)
    cluster = LocalCluster(n_workers=n_workers, threads_per_worker=1, processes=False,
                           protocol="tcp://", host="127.0.0.1",
                           dashboard_address="127.0.0.1:0", scheduler_kwargs={"dashboard": False})
    return Client(cluster), cluster


def _hyperparameters(ctx):
    """Fixed, or estimated once on the first chunk (stored in the manifest for resumes)."""
    work = ctx["work"]
    if work.manifest.get("hyper"):
        return work.manifest["hyper"]
    sigma = ctx["sigma"]
    if ctx["lam"] is not None:
        hyper = {"lam": float(ctx["lam"]),
                 "noise_sd": None if sigma is not None else float(ctx["noise_sd"]),
                 "how": "fixed by the user"}
    else:
        first = next(iter(ctx["reader"]), None)
        if first is None:
            raise InputError(ctx["reader"].source, "has no frames")
        _, _, acc, _ = frame_statuses(first, -np.inf, min_readings=2)
        Y = first.Y[acc & (np.isfinite(first.Y).sum(1) >= 2)]
        if not len(Y):
            raise InputError(ctx["reader"].source, "no frame in the first chunk has 2 readings; "
                             "give --lam and --noise-sd")
        obs = np.isfinite(Y)
        keys, inv, cnt = np.unique(np.packbits(obs, axis=1), axis=0, return_inverse=True,
                                   return_counts=True)
        inv = inv.ravel()
        # most common pattern among those with the most readings seen often enough
        nread = obs[[np.flatnonzero(inv == g)[0] for g in range(len(keys))]].sum(1)
        best = int(np.lexsort((-nread, -cnt))[0])
        rows = np.flatnonzero(inv == best)[: ctx["calibration_frames"]]
        idx = np.flatnonzero(obs[rows[0]])
        dom = ctx["domain"]
        prior_sd = np.sqrt(SmoothnessPrior(s=ctx["s"]).shape(dom.eigenvalues, dom.degrees))
        G = dom.design(ctx["points"][idx])
        lam, nsd = pooled_evidence_fit(G, Y[np.ix_(rows, idx)],
                                       None if sigma is None else sigma[idx], prior_sd)
        hyper = {"lam": lam, "noise_sd": nsd,
                 "how": f"pooled evidence (type-II maximum likelihood) over {len(rows)} frames "
                        f"of the first chunk sharing the most common drop-out pattern "
                        f"({idx.size} readings)"}
    work.manifest["hyper"] = hyper
    work.save()
    return hyper


def _count(work, status, reason):
    counts = work.manifest.setdefault("counts", {})
    reasons = work.manifest.setdefault("reasons", {})
    for v in sorted(_STATUSES):  # the order np.unique gave
        c = int(np.count_nonzero(status == v))
        if c:
            counts[v] = counts.get(v, 0) + c
    for r in reason[~np.equal(reason, None).astype(bool)]:
        key = str(r).split(":")[0].split(" at line")[0]
        reasons[key] = reasons.get(key, 0) + 1


def _static_chunk(inverter, chunk, last_time, kind, fmt):
    """Everything for one chunk: statuses, estimates, the two tables."""
    status, reason, acc, last = frame_statuses(chunk, last_time, min_readings=2)
    n_used = np.isfinite(chunk.Y).sum(axis=1)
    L = len(chunk)
    cmean, csd, chi2 = np.full(L, np.nan), np.full(L, np.nan), np.full(L, np.nan)
    ok = status == "ok"
    if ok.any():
        qm, qs, cm, cs, c2 = inverter.solve(chunk.Y if ok.all() else chunk.Y[ok])
        cmean[ok], csd[ok], chi2[ok] = cm, cs, c2
        qtab = _query_table(chunk.t[ok], inverter.query_labels, qm, qs, inverter.z, kind)
    else:
        qtab = None
    ftab = _frames_table(chunk, status, reason, n_used, cmean, csd, chi2, kind)
    return ftab, qtab, status, reason, last


def _run_static(ctx, hyper):
    reader, work, fmt = ctx["reader"], ctx["work"], ctx["fmt"]
    inverter = StaticInverter(ctx["domain"], ctx["points"], ctx["sigma"], hyper["lam"],
                              hyper["noise_sd"], ctx["qpts"], s=ctx["s"], level=ctx["level"])
    inverter.query_labels = ctx["qlabels"]
    done = work.manifest["done"].get("static", 0)
    last_time = work.manifest.get("last_time", -np.inf)
    last_time = -np.inf if last_time is None else last_time
    client = ctx.get("client")
    bar = _progress()
    pending = []

    def finish(i, result, n):
        nonlocal last_time
        ftab, qtab, status, reason, _ = result
        bio.write_table(ftab, work.part("frames", i, fmt), fmt)
        bio.write_table(qtab if qtab is not None else _empty_query(reader.time_kind or "number"),
                        work.part("query", i, fmt), fmt)
        _count(work, status, reason)
        work.manifest["done"]["static"] = i + 1
        work.manifest["last_time"] = result[4]
        work.manifest["n_chunks"] = i + 1
        work.save()
        _release_memory()
        bar.update(n)
        _sleep_for_tests()

    try:
        for i, chunk in enumerate(_prefetch(reader)):
            if i < done:
                # statuses depend on the last accepted time, restored from the manifest
                continue
            kind = reader.time_kind or "number"
            if client is None:
                res = _static_chunk(inverter, chunk, last_time, kind, fmt)
                last_time = res[4]
                finish(i, res, len(chunk))
            else:
                # statuses are cheap and sequential; the inversion runs on the cluster
                _, _, _, nxt = frame_statuses(chunk, last_time, min_readings=2)
                fut = client.submit(_static_chunk, inverter, chunk, last_time, kind, fmt,
                                    pure=False)
                last_time = nxt
                pending.append((i, fut, len(chunk)))
                while len(pending) > 2 * max(ctx["n_workers"], 1):
                    j, f, n = pending.pop(0)
                    finish(j, f.result(), n)
        for j, f, n in pending:
            finish(j, f.result(), n)
    finally:
        bar.close()
    work.manifest.setdefault("n_chunks", done)
    work.manifest.setdefault("counts", {})
    work.save()
    return {"patterns_factorised": inverter.n_factorised if client is None else None}


def _merge(work, n_chunks, out, fmt, kind):
    out.mkdir(parents=True, exist_ok=True)
    for name in ("frames", "query"):
        parts = [work.part(name, i, fmt) for i in range(n_chunks)]
        if parts:
            bio.merge_parts(parts, out / f"{name}.{fmt}", fmt)
        else:
            empty = _empty_query(kind) if name == "query" else _frames_table(
                bio.Chunk(np.empty(0, np.int64), np.empty(0), np.empty((0, 0)),
                          np.empty(0, object)), np.empty(0, object), np.empty(0, object),
                np.empty(0), np.empty(0), np.empty(0), np.empty(0), kind)
            bio.write_table(empty, out / f"{name}.{fmt}", fmt)
