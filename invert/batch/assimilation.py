r"""Assimilation mode of a batch run: Kalman filter and RTS smoother over the coefficients.

Sequential algorithm (the default): the forward pass filters chunk after chunk and spills each
filtered segment to the working folder (so memory stays bounded); the backward pass smooths
the segments from the last to the first and writes each chunk's part files. The filter and
smoother states passed from one chunk to its neighbour are small and are checkpointed with the
manifest, so an interrupted run resumes at the chunk where it stopped. Spilled segments and
states are ``.npz`` data files (:mod:`invert.batch.spill`), never pickles. Each chunk's step is an
engine task that receives its neighbour's state (the chain is sequential by nature).

Parallel-in-time algorithm (``job.parallel_in_time``, exact mode only): chunk summaries
combined by an associative scan (Särkkä & García-Fernández 2021), every chunk filtered and
smoothed as independent tasks; see :func:`parallel_chunks`.

References
----------
.. [1] S. Särkkä, *Bayesian Filtering and Smoothing*, Cambridge University Press, 2013.
.. [2] S. Särkkä and Á. F. García-Fernández, "Temporal parallelization of Bayesian smoothers",
       IEEE Trans. Automatic Control 66:299–306, 2021. doi:10.1109/TAC.2020.2976316
"""

from __future__ import annotations

from functools import partial

import numpy as np

from ..io.sources import seconds
from ..prior import SmoothnessPrior
from ..problem import interval_z
from ..stages.assimilate import (
    CoefficientDynamics,
    FilterSegment,
    FilterState,
    SmootherState,
    combine_filter,
    combine_smoother,
    filter_segment,
    filter_summary,
    fit_time_scale,
    smooth_segment,
    smoother_summary,
)
from .chain import ChainSteps, run_chain
from .checkpoint import ChunkDone
from .kernel_chain import RECURSION, chunk_info, chunk_tables_from, kernel_chunks
from .overlap import overlapped_chunks
from .statuses import count_statuses, frame_statuses

__all__ = ["assimilation_chunks", "parallel_chunks", "dynamics", "STATE_CLASSES"]

#: The dataclasses spilled to the working folder (the only ones read back, as data).
STATE_CLASSES = (FilterState, FilterSegment, SmootherState)

#: Added to the recursion's description with the sensor-health model.
HEALTH_RECURSION = ("; state augmented by per-sensor offsets (zero-sum random-walk contrasts), "
                    "each reading weighted by its probability of being good (good/faulty "
                    "predictive mixture)")

_DYNAMICS = ("per-harmonic Ornstein-Uhlenbeck with the smoothness prior as stationary law; "
             "random-walk mean level")


def dynamics(job, hyper):
    r"""Build the coefficient dynamics of the job (time scale 1, set later).

    Parameters
    ----------
    job : BatchJob
    hyper : dict
        ``lam`` and ``noise_sd``: the prior variance is :math:`\tau^2 = \sigma^2/\lambda`.

    Returns
    -------
    CoefficientDynamics
    """
    dom, sigma = job.domain, job.sigma
    noise_var = sigma**2 if sigma is not None else np.full(len(job.sensors),
                                                         hyper["noise_sd"] ** 2)
    tau2 = (1.0 if sigma is not None else hyper["noise_sd"] ** 2) / hyper["lam"]
    shape = SmoothnessPrior(s=job.s).shape(dom.eigenvalues, dom.degrees)
    return CoefficientDynamics.from_prior(dom.design(job.points), noise_var, shape, dom.degrees,
                                          tau2=tau2, time_scale=1.0)


def forward_task(model, state, chunk, last_time, steady_tol, max_transient):
    """Filter one chunk from ``state`` (an engine task): ``(state, segment, info, last)``."""
    info, last = chunk_info(chunk, last_time)
    acc = info["acc"]
    state, seg = filter_segment(model, state, seconds(chunk.t[acc]), chunk.Y[acc],
                                steady_tol=steady_tol,
                                max_transient=max_transient)
    return state, seg, info, last


def chunk_tables(info, seg, ms, sid, Ps_table, Hq, labels, z, kind):
    """Build the ``frames`` and ``query`` tables of one smoothed chunk (a task)."""
    qvar = np.array([np.einsum("ij,jk,ik->i", Hq, P, Hq) for P in Ps_table]) \
        if Ps_table else np.empty((0, len(Hq)))
    c0 = np.array([P[0, 0] for P in Ps_table])
    if not info["acc"].any():
        return chunk_tables_from(info, None, None, None, None, None, None, labels, z, kind)
    return chunk_tables_from(info, ms[:, 0], np.sqrt(np.clip(c0[sid], 0, None)), seg.nis,
                             seg.n_used, ms @ Hq.T, np.sqrt(np.clip(qvar[sid], 0, None)),
                             labels, z, kind)


def _time_scale(job, source, model, hyper, work):
    """Fix the time scale of the dynamics: the job's, or maximum likelihood on the log."""
    if hyper.get("time_scale") is not None:
        return
    if job.time_scale is not None:
        hyper["time_scale"] = float(job.time_scale)
        hyper["time_scale_how"] = "fixed by the user"
    else:
        ts, Ys, last = [], [], -np.inf
        n = 0
        for chunk in source:
            _, _, acc, last = frame_statuses(chunk, last, min_readings=1)
            ts.append(seconds(chunk.t[acc]))
            Ys.append(chunk.Y[acc])
            n += int(acc.sum())
            if n >= job.ml_frames:
                break
        t = np.concatenate(ts)[:job.ml_frames]
        Y = np.vstack(Ys)[:job.ml_frames]
        T, _ = fit_time_scale(model, t, Y, steady_tol=job.steady_tol)
        hyper["time_scale"] = T
        hyper["time_scale_how"] = (f"maximum likelihood (prediction-error decomposition) "
                                   f"over the first {len(t)} frames")
    work.save()


def assimilation_chunks(job, source, engine, work, hyper):
    """Run the assimilation job, yielding after each chunk is committed.

    Parameters
    ----------
    job : BatchJob
    source : LogSource
    engine : Engine
    work : WorkFolder
    hyper : dict
        ``lam``, ``noise_sd`` (the manifest's entry: the time scale is added to it).

    Yields
    ------
    ChunkDone

    Returns
    -------
    dict
        Summary entries.
    """
    model = dynamics(job, hyper)
    _time_scale(job, source, model, hyper, work)
    model = model.with_time_scale(hyper["time_scale"])
    if job.parallel_in_time:
        loglik = yield from parallel_chunks(job, source, engine, work, model)
        extra = {"max_transient": None, "recursion": "exact (NumPy)",
                 "parallel": "associative scan over chunk summaries (Särkkä & "
                             "García-Fernández 2021)"}
    elif job.sensor_health:
        from .health_chain import health_chunks  # only runs with --sensor-health load it

        loglik = yield from health_chunks(job, source, engine, work, model)
        extra = {"max_transient": None, "recursion": RECURSION + HEALTH_RECURSION}
    elif job.max_transient is None and getattr(engine, "workers", 1) > 1:
        loglik, handover = yield from overlapped_chunks(job, source, engine, work, model,
                                                        tol=job.handover_tol,
                                                        warmup=job.warmup)
        extra = {"max_transient": None, "recursion": RECURSION, "handover": handover}
    elif job.max_transient is None:
        loglik = yield from kernel_chunks(job, source, engine, work, model)
        extra = {"max_transient": None, "recursion": RECURSION}
    else:
        loglik = yield from run_chain(job, source, engine, work, shortcut_steps(job, model),
                                      model.n_coef)
        extra = {"max_transient": job.max_transient,
                 "recursion": (f"steady-state shortcut: exact for up to {job.max_transient} "
                               f"frames after a change of drop-out pattern or time step, then "
                               f"the cached steady state (tolerance {job.steady_tol:g})")}
    work.manifest.setdefault("counts", {})
    return {"time_scale": hyper["time_scale"], "time_scale_how": hyper["time_scale_how"],
            "loglik": loglik, "steady_tol": job.steady_tol, **extra, "dynamics": _DYNAMICS}


def shortcut_steps(job, model):
    """Return the chain steps of the NumPy recursion with the steady-state shortcut."""
    kw = {"steady_tol": job.steady_tol, "max_transient": job.max_transient}
    return ChainSteps(partial(forward_task, model, **kw), partial(shortcut_backward, **kw),
                      FilterState.initial(model), SmootherState(),
                      lambda state: state.loglik, STATE_CLASSES, "s")


def shortcut_backward(seg, bstate, info, Hq, labels, z, kind, *, steady_tol, max_transient):
    """Smooth one filtered segment and build its tables (an engine task)."""
    bstate, ms, sid, tab = smooth_segment(seg, bstate, steady_tol=steady_tol,
                                          max_transient=max_transient)
    ftab, qtab = chunk_tables(info, seg, ms, sid, tab, Hq[1:], labels, z, kind)
    return bstate, ftab, qtab


# --- parallel in time ----------------------------------------------------------------------------
def _summary_task(model, t, Y, t_prev, first):
    return filter_summary(model, t, Y, t_prev=t_prev, first=first)


def _filter_from(model, m, P, t_prev, t, Y, steady_tol, offset=0):
    state = FilterState.initial(model) if m is None else FilterState(m, P, t=t_prev)
    state.next_id = offset  # covariance record ids stay distinct between chunks
    return filter_segment(model, state, t, Y, steady_tol=steady_tol)


def _smooth_and_tables(seg, ms, Ps, pred, steady_tol, info, Hq, labels, z, kind):
    state = SmootherState() if ms is None else SmootherState(ms, Ps, pred)
    _, ms_out, sid, tab = smooth_segment(seg, state, steady_tol=steady_tol)
    return chunk_tables(info, seg, ms_out, sid, tab, Hq, labels, z, kind)


def _scan_entering(summaries):
    """Exclusive scan of filtering elements: the filtered state entering each chunk."""
    entering, acc_el = [], None
    for el in summaries:
        entering.append(None if acc_el is None else (acc_el[1], acc_el[2]))
        if el is not None:
            acc_el = el if acc_el is None else combine_filter(acc_el, el)
    return entering


def _scan_leaving(ssum):
    """Reverse exclusive scan of smoothing elements: the smoothed state leaving each chunk."""
    leaving, back = [None] * len(ssum), None
    for i in range(len(ssum) - 1, -1, -1):
        leaving[i] = back
        if ssum[i] is not None:
            back = ssum[i] if back is None else combine_smoother(ssum[i], back)
    return leaving


def _filter_all(job, source, engine, work, model):
    """Phases 1-2: chunk summaries, the scan, every chunk filtered from its entering state."""
    last, t_prev = -np.inf, np.nan
    sum_futs, n = [], 0
    for i, chunk in enumerate(source):
        info, last = chunk_info(chunk, last)
        acc = info["acc"]
        ta, Ya = seconds(chunk.t[acc]), chunk.Y[acc]
        work.dump((ta, Ya, info, t_prev), f"pchunk-{i:06d}.npz", STATE_CLASSES)
        sum_futs.append(engine.submit(_summary_task, model, ta, Ya, t_prev,
                                      n == 0 and len(ta) > 0))
        if len(ta):
            t_prev = float(ta[-1])
            n += len(ta)
        count_statuses(work.manifest, info["status"], info["reason"])
    entering = _scan_entering(engine.gather(sum_futs))
    seg_futs = []
    for i, ent in enumerate(entering):
        ta, Ya, _, tp = work.load(f"pchunk-{i:06d}.npz", STATE_CLASSES)
        m, P = ent if ent is not None else (None, None)
        seg_futs.append(engine.submit(_filter_from, model, m, P, tp, ta, Ya, job.steady_tol,
                                      i << 40))
    return engine.gather(seg_futs)


def parallel_chunks(job, source, engine, work, model):
    """Exact mode, parallel in time: chunk summaries combined by an associative scan.

    1. Each chunk's filtering element (:func:`filter_summary`) as a task, in parallel.
    2. An exclusive scan over the elements (here, one small product per chunk) gives the
       filtered mean and covariance entering every chunk; each chunk is then filtered from
       its own entering state, in parallel.
    3. Each chunk's smoothing element (:func:`smoother_summary`), in parallel; a reverse scan
       gives the smoothed state leaving every chunk; each chunk is smoothed and formatted in
       parallel.

    The result equals the sequential smoother up to rounding (Särkkä & García-Fernández 2021);
    with ``steady_tol > 0`` the shortcut restarts at each chunk, a difference of the order of
    ``steady_tol``. Chunk data wait in the working folder between the phases; an interrupted
    run restarts this mode from the beginning.

    Yields
    ------
    ChunkDone
        Phase ``"parallel"``, after each chunk's part files are written.

    Returns
    -------
    float
        The log-likelihood of the log.
    """
    work.manifest["counts"], work.manifest["reasons"] = {}, {}
    results = _filter_all(job, source, engine, work, model)
    segs = [r[1] for r in results]
    loglik = float(sum(r[0].loglik for r in results))
    n_chunks = len(segs)
    nxt, following = [None] * n_chunks, None
    for i in range(n_chunks - 1, -1, -1):
        nxt[i] = following
        if len(segs[i].t):
            following = segs[i].pred_table[segs[i].pid[0]], int(segs[i].pid[0])
    leaving = _scan_leaving(engine.gather(
        [engine.submit(smoother_summary, segs[i], None if nxt[i] is None else nxt[i][0])
         for i in range(n_chunks)]))
    Hq = job.domain.design(job.query_points)
    z = interval_z(job.level)
    kind = source.time_kind or "number"
    out_futs = []
    for i in range(n_chunks):
        _, _, info, _ = work.load(f"pchunk-{i:06d}.npz", STATE_CLASSES)
        if leaving[i] is None:
            ms = Ps = pred = None
        else:
            (f, Pp), pid = nxt[i]
            ms, Ps, pred = leaving[i][1], leaving[i][2], (pid, f, Pp)
        out_futs.append(engine.submit(_smooth_and_tables, segs[i], ms, Ps, pred,
                                      job.steady_tol, info, Hq, job.query_labels, z, kind))
    for i, fut in enumerate(out_futs):
        ftab, qtab = fut.result()
        work.write_parts(i, job.table_fmt, ftab, qtab)
        yield ChunkDone("parallel", i, len(ftab))
    work.manifest["n_chunks"] = n_chunks
    work.manifest["loglik"] = loglik
    work.save()
    return loglik
