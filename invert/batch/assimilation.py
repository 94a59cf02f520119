"""Assimilation mode of :func:`invert.batch.runner.run_batch`: forward filter, backward smoother.

The forward pass filters chunk after chunk and spills each filtered segment to the working
folder (so memory stays bounded); the backward pass smooths the segments from the last to the
first and writes each chunk's part files. The filter and smoother states passed from one chunk
to its neighbour are small and are checkpointed with the manifest, so an interrupted run resumes
at the chunk where it stopped. On the Dask engine each chunk's filter and smoother step runs as
a task that receives its neighbour's state (the chain is sequential by nature; the output
formatting of chunks runs in parallel).
"""

from __future__ import annotations

import os

import numpy as np

from . import runner as _b
from ..stages.assimilate.core import (FilterState, SmootherState, _combine_filter, _combine_smoother,
                                filter_segment, filter_summary, fit_time_scale, smooth_segment,
                                smoother_summary)


def _forward_task(model, state, chunk, last_time, steady_tol, max_transient=None):
    status, reason, acc, last = _b.frame_statuses(chunk, last_time, min_readings=1)
    state, seg = filter_segment(model, state, chunk.t[acc], chunk.Y[acc], steady_tol=steady_tol,
                                max_transient=max_transient)
    info = {"t": chunk.t, "frame": chunk.frame, "status": status, "reason": reason,
            "acc": acc, "n_used": np.isfinite(chunk.Y).sum(axis=1)}
    return state, seg, info, last


def _backward_task(seg, bstate, steady_tol, max_transient=None):
    return smooth_segment(seg, bstate, steady_tol=steady_tol, max_transient=max_transient)


def _tables(info, seg, ms, sid, Ps_table, Hq, labels, z, kind):
    L = len(info["t"])
    acc = info["acc"]
    cmean, csd, chi2 = np.full(L, np.nan), np.full(L, np.nan), np.full(L, np.nan)
    qvar = np.array([np.einsum("ij,jk,ik->i", Hq, P, Hq) for P in Ps_table]) \
        if Ps_table else np.empty((0, len(Hq)))
    c0 = np.array([P[0, 0] for P in Ps_table])
    if acc.any():
        cmean[acc] = ms[:, 0]
        csd[acc] = np.sqrt(np.clip(c0[sid], 0, None))
        nis = seg.nis.copy()
        nis[seg.n_used == 0] = np.nan
        chi2[acc] = nis
        qm = ms @ Hq.T
        qs = np.sqrt(np.clip(qvar[sid], 0, None))
        qtab = _b._query_table(info["t"][acc], labels, qm, qs, z, kind)
    else:
        qtab = _b._empty_query(kind)
    chunk = _b.bio.Chunk(info["frame"], info["t"], np.empty((L, 0)), info["reason"])
    ftab = _b._frames_table(chunk, info["status"], info["reason"], info["n_used"], cmean, csd,
                            chi2, kind)
    return ftab, qtab


def run(ctx, model, time_scale, steady_tol, ml_frames, max_transient=None):
    """Forward then backward over the log; returns summary entries."""
    from scipy import stats

    reader, work, fmt = ctx["reader"], ctx["work"], ctx["fmt"]
    client = ctx.get("client")
    hyper = work.manifest["hyper"]
    if hyper.get("time_scale") is None:
        if time_scale is not None:
            hyper["time_scale"] = float(time_scale)
            hyper["time_scale_how"] = "fixed by the user"
        else:
            ts, Ys, last = [], [], -np.inf
            n = 0
            for chunk in reader:
                _, _, acc, last = _b.frame_statuses(chunk, last, min_readings=1)
                ts.append(chunk.t[acc])
                Ys.append(chunk.Y[acc])
                n += int(acc.sum())
                if n >= ml_frames:
                    break
            t = np.concatenate(ts)[:ml_frames]
            Y = np.vstack(Ys)[:ml_frames]
            T, ll = fit_time_scale(model, t, Y, steady_tol=steady_tol)
            hyper["time_scale"] = T
            hyper["time_scale_how"] = (f"maximum likelihood (prediction-error decomposition) "
                                       f"over the first {len(t)} frames")
        work.save()
    model = model.with_time_scale(hyper["time_scale"])
    if client is not None and max_transient is None:
        return _run_parallel(ctx, model, hyper, steady_tol)
    done = work.manifest["done"]
    n_fwd = done.get("forward", 0)
    state = work.load(f"fstate-{n_fwd - 1:06d}.pkl") if n_fwd else FilterState.initial(model)
    last = work.manifest.get("last_time")
    last = -np.inf if last is None else last
    bar = _b._progress()
    try:
        if not done.get("forward_complete"):
            for i, chunk in enumerate(reader):
                if i < n_fwd:
                    continue
                if client is None:
                    state, seg, info, last = _forward_task(model, state, chunk, last,
                                                           steady_tol, max_transient)
                else:
                    state, seg, info, last = client.submit(
                        _forward_task, model, state, chunk, last, steady_tol, max_transient,
                        pure=False).result()
                work.dump((seg, info), f"seg-{i:06d}.pkl")
                work.dump(state, f"fstate-{i:06d}.pkl")
                prev = work.dir / f"fstate-{i - 1:06d}.pkl"
                done["forward"] = i + 1
                work.manifest["last_time"] = last
                work.save()
                if prev.exists():
                    os.remove(prev)
                bar.update(len(chunk))
                _b._sleep_for_tests()
            done["forward_complete"] = True
            work.manifest["n_chunks"] = done.get("forward", 0)
            work.manifest["loglik"] = state.loglik
            work.save()
        n_chunks = work.manifest["n_chunks"]
        kind = reader.time_kind or work.manifest.get("time_kind") or "number"
        work.manifest["time_kind"] = kind
        Hq = ctx["domain"].design(ctx["qpts"])
        z = float(stats.norm.ppf((1 + ctx["level"]) / 2))
        n_back = done.get("backward", 0)
        bstate = work.load(f"bstate-{n_chunks - n_back:06d}.pkl") if n_back else SmootherState()
        for i in range(n_chunks - 1 - n_back, -1, -1):
            seg, info = work.load(f"seg-{i:06d}.pkl")
            if client is None:
                bstate, ms, sid, tab = _backward_task(seg, bstate, steady_tol, max_transient)
                ftab, qtab = _tables(info, seg, ms, sid, tab, Hq, ctx["qlabels"], z, kind)
            else:
                bstate, ms, sid, tab = client.submit(_backward_task, seg, bstate, steady_tol,
                                                     max_transient, pure=False).result()
                fut = client.submit(_tables, info, seg, ms, sid, tab, Hq, ctx["qlabels"], z,
                                    kind, pure=False)
                ftab, qtab = fut.result()
            _b.bio.write_table(ftab, work.part("frames", i, fmt), fmt)
            _b.bio.write_table(qtab, work.part("query", i, fmt), fmt)
            work.dump(bstate, f"bstate-{i:06d}.pkl")
            _b._count(work, info["status"], info["reason"])
            done["backward"] = n_chunks - i
            work.save()
            for old in (f"bstate-{i + 1:06d}.pkl", f"seg-{i:06d}.pkl"):
                if (work.dir / old).exists():
                    os.remove(work.dir / old)
            bar.update(len(info["t"]))
            _b._sleep_for_tests()
    finally:
        bar.close()
    work.manifest.setdefault("counts", {})
    return {"time_scale": hyper["time_scale"], "time_scale_how": hyper["time_scale_how"],
            "loglik": work.manifest.get("loglik"), "steady_tol": steady_tol,
            "max_transient": max_transient,
            "dynamics": "per-harmonic Ornstein-Uhlenbeck with the smoothness prior as "
                        "stationary law; random-walk mean level"}


def _summary_task(model, t, Y, t_prev, first):
    return filter_summary(model, t, Y, t_prev=t_prev, first=first)


def _filter_from(model, m, P, t_prev, t, Y, steady_tol, offset=0):
    state = FilterState.initial(model) if m is None else FilterState(m, P, t=t_prev)
    state.next_id = offset  # covariance record ids stay distinct between chunks
    return filter_segment(model, state, t, Y, steady_tol=steady_tol)


def _smooth_and_tables(seg, ms, Ps, pred, steady_tol, info, Hq, labels, z, kind):
    state = SmootherState() if ms is None else SmootherState(ms, Ps, pred)
    _, ms_out, sid, tab = smooth_segment(seg, state, steady_tol=steady_tol)
    return _tables(info, seg, ms_out, sid, tab, Hq, labels, z, kind)


def _run_parallel(ctx, model, hyper, steady_tol):
    """Dask, exact mode: chunk summaries combined by an associative scan, chunks in parallel.

    1. Each chunk's filtering element (:func:`filter_summary`) on the cluster, in parallel.
    2. An exclusive scan over the elements (driver, one small product per chunk) gives the
       filtered mean and covariance entering every chunk; each chunk is then filtered from
       its own entering state, in parallel.
    3. Each chunk's smoothing element (:func:`smoother_summary`), in parallel; a reverse scan
       gives the smoothed state leaving every chunk; each chunk is smoothed and formatted in
       parallel.
    The result equals the sequential smoother up to rounding (Särkkä & García-Fernández 2021);
    with ``steady_tol > 0`` the shortcut restarts at each chunk, a difference of the order of
    ``steady_tol``. Chunk data wait in the working folder between the phases; an interrupted
    run restarts this mode from the beginning.
    """
    from scipy import stats

    reader, work, fmt = ctx["reader"], ctx["work"], ctx["fmt"]
    client = ctx["client"]
    last = -np.inf
    t_prev = np.nan
    sum_futs, n = [], 0
    bar = _b._progress()
    for i, chunk in enumerate(reader):
        status, reason, acc, last = _b.frame_statuses(chunk, last, min_readings=1)
        info = {"t": chunk.t, "frame": chunk.frame, "status": status, "reason": reason,
                "acc": acc, "n_used": np.isfinite(chunk.Y).sum(axis=1)}
        ta, Ya = chunk.t[acc], chunk.Y[acc]
        work.dump((ta, Ya, info, t_prev), f"pchunk-{i:06d}.pkl")
        sum_futs.append(client.submit(_summary_task, model, ta, Ya, t_prev,
                                      n == 0 and len(ta) > 0, pure=False))
        if len(ta):
            t_prev = float(ta[-1])
            n += len(ta)
        _b._count(work, status, reason)
    n_chunks = len(sum_futs)
    summaries = client.gather(sum_futs)
    # exclusive scan: filtered state entering each chunk
    entering, acc_el = [], None
    for el in summaries:
        entering.append(None if acc_el is None else (acc_el[1], acc_el[2]))
        if el is not None:
            acc_el = el if acc_el is None else _combine_filter(acc_el, el)
    seg_futs = []
    for i in range(n_chunks):
        ta, Ya, info, tp = work.load(f"pchunk-{i:06d}.pkl")
        m, P = entering[i] if entering[i] is not None else (None, None)
        seg_futs.append(client.submit(_filter_from, model, m, P, tp, ta, Ya, steady_tol,
                                      i << 40, pure=False))
    results = client.gather(seg_futs)
    segs = [r[1] for r in results]
    loglik = float(sum(r[0].loglik for r in results))
    # smoothing elements and the reverse scan
    nxt = [None] * n_chunks
    following = None
    for i in range(n_chunks - 1, -1, -1):
        nxt[i] = following
        if len(segs[i].t):
            following = segs[i].pred_table[segs[i].pid[0]], int(segs[i].pid[0])
    ss_futs = [client.submit(smoother_summary, segs[i], None if nxt[i] is None else nxt[i][0],
                             pure=False) for i in range(n_chunks)]
    ssum = client.gather(ss_futs)
    leaving, back = [None] * n_chunks, None
    for i in range(n_chunks - 1, -1, -1):
        leaving[i] = back
        if ssum[i] is not None:
            back = ssum[i] if back is None else _combine_smoother(ssum[i], back)
    Hq = ctx["domain"].design(ctx["qpts"])
    z = float(stats.norm.ppf((1 + ctx["level"]) / 2))
    kind = reader.time_kind or "number"
    out_futs = []
    for i in range(n_chunks):
        _, _, info, _ = work.load(f"pchunk-{i:06d}.pkl")
        if leaving[i] is None:
            ms = Ps = pred = None
        else:
            (f, Pp), pid = nxt[i]
            ms, Ps, pred = leaving[i][1], leaving[i][2], (pid, f, Pp)
        out_futs.append(client.submit(_smooth_and_tables, segs[i], ms, Ps, pred, steady_tol,
                                      info, Hq, ctx["qlabels"], z, kind, pure=False))
    for i, fut in enumerate(out_futs):
        ftab, qtab = fut.result()
        _b.bio.write_table(ftab, work.part("frames", i, fmt), fmt)
        _b.bio.write_table(qtab, work.part("query", i, fmt), fmt)
        bar.update(len(ftab))
    bar.close()
    work.manifest["n_chunks"] = n_chunks
    work.manifest["loglik"] = loglik
    work.save()
    return {"time_scale": hyper["time_scale"], "time_scale_how": hyper["time_scale_how"],
            "loglik": loglik, "steady_tol": steady_tol, "max_transient": None,
            "parallel": "associative scan over chunk summaries (Särkkä & García-Fernández "
                        "2021)",
            "dynamics": "per-harmonic Ornstein-Uhlenbeck with the smoothness prior as "
                        "stationary law; random-walk mean level"}
