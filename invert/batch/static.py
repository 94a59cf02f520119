r"""Static mode of a batch run: each frame its own Tikhonov fit with fixed parameters.

For fixed parameters the posterior mean is linear in the observed readings,
:math:`\bar u_q = H_q M_P y_o`, and the sds do not depend on them, so frames that share a
drop-out pattern :math:`P` share one factorisation: :math:`H_q M_P` and the sds are computed
once per pattern from the same standard-form SVD as ``rim-invert fit``
(:class:`~invert.stages._spectrum.Spectrum`), and the work per frame is a matrix product,
vectorised over the frames of a chunk: the new patterns of a chunk are factorised together
(one stacked SVD per number of readings), the chunk's most common pattern is applied to all
its frames in one product and every other pattern to its own rows. The next chunk is read and
parsed in a background thread meanwhile (one chunk ahead, :func:`prefetch`).
"""

from __future__ import annotations

import threading
from collections import OrderedDict, deque

import numpy as np

from ..prior import SmoothnessPrior
from ..problem import LinearProblem, interval_z
from ..stages._spectrum import rank_mask, standard_form
from .checkpoint import ChunkDone
from .gross import drop_gross_cells
from .statuses import count_statuses, frame_statuses
from .tables import empty_query, frames_table, query_table, release_memory

__all__ = ["StaticInverter", "static_chunk", "static_chunks", "prefetch"]

#: New patterns factorised per stacked call (bounds the temporary arrays).
_FACTOR_BLOCK = 256


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
                 max_patterns=50000, cache_bytes=256 * 2**20, sensors=None):
        self.domain = domain
        self.sensors = None if sensors is None else np.asarray(sensors).astype(str)
        self.points = np.asarray(points, float)
        self.sigma = None if sigma is None else np.asarray(sigma, float)
        self.lam = float(lam)
        self.noise_sd = noise_sd
        self.noise_var = 1.0 if sigma is not None else float(noise_sd) ** 2
        self.query = np.asarray(query, float)
        self.s = s
        self.level = level
        self.z = interval_z(level)
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
            U, sv, Vt = np.linalg.svd(standard_form(self.G[idx], w, d), full_matrices=True)
        else:
            U, sv, Vt = np.empty((b, 0, 0)), np.empty((b, 0)), np.broadcast_to(np.eye(p),
                                                                                (b, p, p))
        r = sv.shape[1]
        keep = rank_mask(sv)                   # the rank cut-off k (a prefix: sv descends)
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
        """(matrix, sds) of each pattern and the number factorised anew.

        ``packed``/``obs``: one row per distinct pattern.
        """
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
        return got, len(new)

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
        return self._solve(Y)[0]

    def _solve(self, Y, residuals=False):
        """:meth:`solve`'s results and the number of patterns factorised for them.

        With ``residuals=True`` the whitened residuals (zeros at missing sensors, shape
        ``(n_frames, n_sensors)``) follow as a third item.
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
        entries, n_new = self._entries(packed[first], obs[first])
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
        res = (out[:, :nq], sds[:, :nq], out[:, nq], sds[:, nq], chi2)
        return (res, n_new, out[:, nq + 1:]) if residuals else (res, n_new)


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


def prefetch(iterable, depth=1):
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


def static_chunk(inverter, chunk, status, reason, labels, kind):
    """Estimate the ``ok`` frames of a chunk and build its two tables (one engine task).

    Parameters
    ----------
    inverter : StaticInverter
    chunk : Chunk
    status, reason : ndarray
        The chunk's statuses (:func:`~invert.batch.statuses.frame_statuses`).
    labels : sequence of str
        Query point labels.
    kind : {"number", "datetime"}

    Returns
    -------
    frames, query : pyarrow.Table
    n_new : int
        Patterns factorised for this chunk.
    """
    n_used = np.isfinite(chunk.Y).sum(axis=1)
    reason = reason.copy()  # gross cells are named here, in this task's copy
    L = len(chunk)
    cmean, csd, chi2 = np.full(L, np.nan), np.full(L, np.nan), np.full(L, np.nan)
    ok = status == "ok"
    n_new = 0
    if ok.any():
        (qm, qs, cm, cs, c2), n_new, reason[ok], n_used[ok] = drop_gross_cells(
            inverter, chunk.Y if ok.all() else chunk.Y[ok], reason[ok])
        cmean[ok], csd[ok], chi2[ok] = cm, cs, c2
        qtab = query_table(chunk.t[ok], labels, qm, qs, inverter.z, kind)
    else:
        qtab = empty_query(kind)
    ftab = frames_table(chunk.t, chunk.frame, status, reason, n_used, cmean, csd, chi2, kind)
    return ftab, qtab, n_new


def static_chunks(job, source, engine, work, hyper):
    """Run the static job chunk by chunk, yielding after each chunk is committed.

    Statuses are computed here, in order (they depend on the last accepted time); the
    inversion of each chunk is an engine task, up to ``engine.in_flight`` of them waiting.
    A chunk is committed (part files, then the manifest) in order; chunks done by an
    interrupted run are skipped.

    Parameters
    ----------
    job : BatchJob
    source : LogSource
    engine : Engine
    work : WorkFolder
    hyper : dict
        ``lam`` and ``noise_sd``.

    Yields
    ------
    ChunkDone

    Returns
    -------
    dict
        Summary entries (``patterns_factorised``).
    """
    inverter = StaticInverter(job.domain, job.points, job.sigma, hyper["lam"],
                              hyper["noise_sd"], job.query_points, s=job.s, level=job.level,
                              sensors=job.sensors)
    man = work.manifest
    done = man["done"].get("static", 0)
    last_time = man.get("last_time", -np.inf)
    last_time = -np.inf if last_time is None else last_time
    pending = deque()
    n_factorised = 0

    def commit():
        nonlocal n_factorised
        i, fut, status, reason, last, n = pending.popleft()
        ftab, qtab, n_new = fut.result()
        work.write_parts(i, job.table_fmt, ftab, qtab)
        count_statuses(man, status, reason)
        man["done"]["static"] = i + 1
        man["last_time"] = last
        man["n_chunks"] = i + 1
        work.save()
        release_memory()
        n_factorised += n_new
        return ChunkDone("static", i, n)

    chunks = prefetch(source)
    try:  # closing the generator early stops the reader thread too
        for i, chunk in enumerate(chunks):
            if i < done:
                # statuses depend on the last accepted time, restored from the manifest
                continue
            kind = source.time_kind or "number"
            status, reason, _, last_time = frame_statuses(chunk, last_time, min_readings=2)
            fut = engine.submit(static_chunk, inverter, chunk, status, reason,
                                job.query_labels, kind)
            pending.append((i, fut, status, reason, last_time, len(chunk)))
            while len(pending) > engine.in_flight:
                yield commit()
    finally:
        chunks.close()
    while pending:
        yield commit()
    man.setdefault("n_chunks", done)
    man.setdefault("counts", {})
    work.save()
    return {"patterns_factorised": n_factorised}
