"""Figures of a fit and the self-contained HTML report.

matplotlib is imported inside the functions that draw (:func:`_mpl`). Every figure is written as
a PNG beside the report and embedded in ``report.html`` as base64, so the report is one file
that opens anywhere, with no script and no network access.
"""

from __future__ import annotations

import base64
import html
from pathlib import Path

import numpy as np

__all__ = [
    "write_figures",
    "write_report",
    "plot_rim_profile",
    "plot_field_maps",
    "plot_exceedance",
    "plot_depth",
    "plot_gap_dependence",
    "plot_residuals",
    "plot_traces",
]

# Plain, colour-blind-safe choices of our own.
_BAND = "#b7d3ea"
_LINE = "#1b4f8a"
_GAP = "#f3c99b"
_READ = "#222222"
_WARN = "#b23a00"


def _mpl():
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    return plt


def _lab(text, unit):
    return f"{text} ({unit})" if unit else text


def _rim_circle(ax, domain, **kw):
    th = np.linspace(0, 2 * np.pi, 400)
    ax.plot(domain.center[0] + domain.radius * np.cos(th),
            domain.center[1] + domain.radius * np.sin(th), **kw)


def _sensor_marks(ax, problem, legend=True):
    ax.plot(problem.points[:, 0], problem.points[:, 1], "o", ms=4, mfc="w", mec="k",
            label="sensor with reading" if legend else None)
    if problem.gap_points is not None and len(problem.gap_points):
        ax.plot(problem.gap_points[:, 0], problem.gap_points[:, 1], "x", ms=6, color=_WARN,
                mew=1.5, label="sensor without reading" if legend else None)


def _grid_map(estimate, n):
    xs, ys, pts, inside = estimate.domain.interior_grid(n)
    return xs, ys, pts, inside


def _full(inside, values):
    out = np.full(inside.shape, np.nan)
    out[inside] = values
    return out


# --------------------------------------------------------------------------------------------
# figures
# --------------------------------------------------------------------------------------------
def plot_rim_profile(ax, estimate, problem, level=0.9, unit="", arcs=None):
    """Rim profile: mean, central band at ``level``, rim readings (with ±sigma bars), unsensed
    arcs shaded and failed sensors marked."""
    from ..diagnostics.diagnose import unsensed_arcs

    domain = estimate.domain
    b = estimate.boundary(720, level)
    t = b["theta_deg"].to_numpy()
    t = np.append(t, 360.0)
    close = lambda c: np.append(b[c].to_numpy(), b[c].to_numpy()[0])  # noqa: E731
    arcs = unsensed_arcs(problem) if arcs is None else arcs
    first = True
    for a, z in np.rad2deg(arcs):
        for lo, hi in ((a, z), (a - 360, z - 360), (a + 360, z + 360)):
            if hi > 0 and lo < 360:
                ax.axvspan(max(lo, 0), min(hi, 360), color=_GAP, alpha=0.7, lw=0,
                           label="no working sensor nearby" if first else None)
                first = False
    ax.fill_between(t, close("lower"), close("upper"), color=_BAND,
                    label=f"{round(level * 100):g} % interval")
    ax.plot(t, close("mean"), color=_LINE, lw=1.5, label="estimate")
    rho, th = domain.to_polar(problem.points)
    rim = rho > 0.999
    err = problem.sigma[rim] if problem.sigma is not None else None
    ax.errorbar(np.rad2deg(np.mod(th[rim], 2 * np.pi)), problem.y[rim], yerr=err, fmt="o",
                ms=4, color=_READ, label="rim reading (± sigma)")
    if problem.gap_points is not None and len(problem.gap_points):
        gr, gt = domain.to_polar(problem.gap_points)
        gdeg = np.rad2deg(np.mod(gt[gr > 0.999], 2 * np.pi))
        ax.plot(gdeg, np.full(gdeg.shape, np.nanmin(b["lower"])), "x", color=_WARN, mew=1.5,
                label="sensor without reading")
    ax.set_xlim(0, 360)
    ax.set_xticks(range(0, 361, 45))
    ax.set_xlabel("rim angle θ (degrees, counter-clockwise from +x)")
    ax.set_ylabel(_lab("value on the rim", unit))
    ax.legend(loc="best", fontsize=7)


def plot_field_maps(fig, estimate, problem, level=0.9, n=121, unit="", length_unit=""):
    """Interior mean with flux lines (level sets of the harmonic conjugate) and posterior sd."""
    domain = estimate.domain
    xs, ys, pts, inside = _grid_map(estimate, n)
    s = estimate.at(pts[inside], level)
    coef = estimate.mean if estimate.draws is None else estimate.draws.mean(axis=0)
    stream = _full(inside, domain.conjugate(coef, pts[inside]))
    axes = fig.subplots(1, 2)
    for ax, data, title, cmap in ((axes[0], s.mean, "estimated field", "magma"),
                                  (axes[1], s.sd, "posterior sd", "cividis")):
        im = ax.pcolormesh(xs, ys, _full(inside, data).reshape(n, n), cmap=cmap, shading="auto")
        fig.colorbar(im, ax=ax, shrink=0.8, label=_lab(title, unit))
        _rim_circle(ax, domain, color="k", lw=0.8)
        _sensor_marks(ax, problem, legend=ax is axes[1])
        ax.set_aspect("equal")
        ax.set_title(title)
        ax.set_xlabel(_lab("x", length_unit))
        ax.set_ylabel(_lab("y", length_unit))
    axes[0].contour(xs, ys, stream.reshape(n, n), levels=16, colors="#e8f1f8", linewidths=0.6,
                    negative_linestyles="solid")
    axes[0].set_title("estimated field, with flux lines")
    axes[1].legend(loc="lower right", fontsize=7)


def plot_exceedance(fig, estimate, problem, threshold, max_exceed=None, n=101, unit="",
                    length_unit=""):
    """Map of the probability that the field exceeds ``threshold``."""
    from ..diagnostics.diagnose import exceedance_probability

    domain = estimate.domain
    xs, ys, pts, inside = _grid_map(estimate, n)
    p = _full(inside, exceedance_probability(estimate, pts[inside], threshold))
    ax = fig.subplots()
    im = ax.pcolormesh(xs, ys, p.reshape(n, n), cmap="Reds", vmin=0, vmax=1, shading="auto")
    fig.colorbar(im, ax=ax, shrink=0.85, label=f"P(value > {threshold:g}{' ' + unit if unit else ''})")
    if np.nanmax(p) > 0.05:
        ax.contour(xs, ys, p.reshape(n, n), levels=[0.05, 0.5, 0.95], colors="k",
                   linewidths=0.7)
    _rim_circle(ax, domain, color="k", lw=0.8)
    _sensor_marks(ax, problem)
    title = f"probability of exceeding {threshold:g}{' ' + unit if unit else ''}"
    if max_exceed is not None:
        title += f"\nanywhere in the disk: {max_exceed.probability:.3f}"
    ax.set_title(title, fontsize=10)
    ax.set_aspect("equal")
    ax.set_xlabel(_lab("x", length_unit))
    ax.set_ylabel(_lab("y", length_unit))
    ax.legend(loc="lower right", fontsize=7)


def plot_depth(fig, estimate, problem, diagnostics, unit=""):
    """Depth of information: attenuation, resolved degree, variance ratio, radial sd."""
    from ..diagnostics.diagnose import attenuation, resolved_degree

    axes = fig.subplots(1, 4)
    res = diagnostics.resolution
    rho = np.linspace(0, 1, 201)
    ax = axes[0]
    for n in (1, 2, 4, 8, 16):
        ax.plot(rho, attenuation(rho, [n])[:, 0], label=f"n = {n}")
    ax.set_xlabel("relative radius r/R")
    ax.set_ylabel("attenuation (r/R)^n")
    ax.set_title("damping of harmonic n")
    ax.legend(fontsize=7)
    if res is not None:
        ax = axes[1]
        rr = np.linspace(0.02, 1, 99)
        ax.step(rr, resolved_degree(estimate, rr, n_readings=problem.n_readings), color=_LINE,
                where="mid")
        ax.set_xlabel("relative radius r/R of a sensor ring")
        ax.set_ylabel("highest resolved degree n")
        ax.set_title(f"resolved by {problem.n_readings} sensors")
        ax = axes[2]
        # Show the degrees where the data matter, and a few beyond (the rest is prior).
        low = np.flatnonzero(res.resolution < 0.02)
        top = int(min(res.degree[-1], max(12, 2 * low[0] if low.size else res.degree[-1])))
        k = res.degree <= top
        ax.bar(res.degree[k], res.variance_ratio[k], color=_BAND, edgecolor=_LINE,
               label="posterior / prior variance")
        ax.plot(res.degree[k], res.resolution[k], "o-", color=_WARN, ms=3, label="resolution")
        ax.axhline(0.5, color="grey", lw=0.7, ls=":")
        ax.set_ylim(0, 1.05)
        ax.set_xlabel("harmonic degree n" + (f" (up to {top} of {res.degree[-1]})"
                                              if top < res.degree[-1] else ""))
        ax.set_title(f"per harmonic (effective dof {res.effective_dof:.1f})")
        ax.legend(fontsize=7, loc="center right")
    else:
        for ax in axes[1:3]:
            ax.set_axis_off()
        axes[1].text(0.5, 0.5, "no prior recorded:\nresolution not available", ha="center")
    ax = axes[3]
    rp = diagnostics.radial
    ax.fill_between(rp.rho, rp.min_sd, rp.max_sd, color=_BAND, label="range over angle")
    ax.plot(rp.rho, rp.rms_sd, color=_LINE, label="rms over angle")
    ax.set_xlabel("relative radius r/R")
    ax.set_ylabel(_lab("posterior sd", unit))
    ax.set_title("posterior sd against radius")
    ax.legend(fontsize=7)


def plot_gap_dependence(fig, estimate, problem, diagnostics, n=101, length_unit=""):
    """Share of each point's Poisson-kernel mass over unsensed arcs, unsensed arcs in colour."""
    from ..diagnostics.diagnose import gap_dependence

    domain = estimate.domain
    xs, ys, pts, inside = _grid_map(estimate, n)
    g = gap_dependence(problem, pts[inside], arcs=diagnostics.gaps.arcs)
    ax = fig.subplots()
    im = ax.pcolormesh(xs, ys, _full(inside, g.share).reshape(n, n), cmap="Oranges", vmin=0,
                       vmax=1, shading="auto")
    fig.colorbar(im, ax=ax, shrink=0.85, label="share of kernel mass over unsensed arcs")
    _rim_circle(ax, domain, color="k", lw=0.8)
    for k, (a, b) in enumerate(g.arcs):
        th = np.linspace(a, b, 100)
        ax.plot(domain.center[0] + domain.radius * np.cos(th),
                domain.center[1] + domain.radius * np.sin(th), color=_WARN, lw=4,
                solid_capstyle="butt", label="unsensed arc" if k == 0 else None)
    _sensor_marks(ax, problem)
    ax.set_aspect("equal")
    ax.set_title("how much the estimate rests on unsensed rim arcs", fontsize=10)
    ax.set_xlabel(_lab("x", length_unit))
    ax.set_ylabel(_lab("y", length_unit))
    ax.legend(loc="lower right", fontsize=7)


def plot_residuals(ax, check):
    """Standardised residual and leave-one-out z per sensor, with ±2 guide lines."""
    k = np.arange(len(check.sensor))
    ax.bar(k - 0.2, check.std_residual, width=0.4, color=_BAND, edgecolor=_LINE,
           label="residual / noise sd")
    ax.bar(k + 0.2, check.loo_z, width=0.4, color=_GAP, edgecolor=_WARN,
           label="leave-one-out z")
    for v in (-2, 2):
        ax.axhline(v, color="grey", lw=0.7, ls=":")
    ax.axhline(0, color="k", lw=0.6)
    ax.set_xticks(k)
    ax.set_xticklabels(check.sensor, rotation=90, fontsize=7)
    ax.set_ylabel("standardised value (noise sd units)")
    ax.set_title("residuals per sensor")
    ax.legend(fontsize=7)


def _trace_arrays(posterior, max_vars=6):
    # (name, array (chain, draw)) for scalar variables of the posterior group.
    try:
        post = posterior["posterior"]
        ds = post.to_dataset() if hasattr(post, "to_dataset") else post
    except Exception:
        return []
    out = []
    for name, da in ds.data_vars.items():
        if set(da.dims) == {"chain", "draw"}:
            out.append((str(name), np.asarray(da.transpose("chain", "draw").values)))
        if len(out) >= max_vars:
            break
    return out


def plot_traces(fig, posterior, max_chains=8):
    """MCMC traces of the sampled scalar posterior variables (up to ``max_chains`` chains, one
    colour each) beside a histogram of all draws; returns False when there is nothing to draw.
    """
    arrays = [(n, a) for n, a in _trace_arrays(posterior) if np.ptp(a) > 0]
    if not arrays:
        return False
    axes = np.atleast_2d(fig.subplots(len(arrays), 2, width_ratios=[3, 1], squeeze=False))
    for (ax, axh), (name, a) in zip(axes, arrays):
        for ch in a[:max_chains]:
            ax.plot(ch, lw=0.7, alpha=0.85)
        ax.set_ylabel(name, fontsize=8)
        axh.hist(a.ravel(), bins=40, orientation="horizontal", color=_BAND, edgecolor=_LINE,
                 lw=0.3)
        axh.set_ylim(ax.get_ylim())
        axh.set_yticklabels([])
    n_ch = min(len(arrays[0][1]), max_chains)
    axes[-1, 0].set_xlabel("draw (after burn-in and thinning)")
    axes[-1, 1].set_xlabel("draws (all chains)")
    axes[0, 0].set_title(f"MCMC traces ({n_ch} of {len(arrays[0][1])} chains shown)")
    axes[0, 1].set_title("distribution")
    return True


# --------------------------------------------------------------------------------------------
# writing
# --------------------------------------------------------------------------------------------
def _save(plt, fig, path):
    fig.savefig(path, dpi=100)
    plt.close(fig)
    return path


def write_figures(out_dir, estimate, problem, readings=None, level=0.9, unit="", *,
                  length_unit="", diagnostics=None, threshold=None):
    """Write the figures of a fit into ``out_dir``; return ``[(path, caption), ...]``.

    On a ball, :func:`invert.report.ball_figures.write_figures_ball` draws the figures instead.
    """
    out = Path(out_dir)
    if getattr(estimate.domain, "kind", "disk") == "ball":
        try:
            from .ball_figures import write_figures_ball
        except ImportError:  # figures for the ball not available in this installation
            return []
        before = set(out.glob("*.png"))
        import inspect

        kw = {"unit": unit} if "unit" in inspect.signature(write_figures_ball).parameters else {}
        made = write_figures_ball(out, estimate, problem, readings, level, **kw)
        paths = [Path(p) for p in made] if made else sorted(set(out.glob("*.png")) - before)
        return [(p, p.stem.replace("_", " ")) for p in paths]
    if diagnostics is None:
        from ..diagnostics.diagnose import diagnose

        diagnostics = diagnose(estimate, problem, level=level, threshold=threshold)
    plt = _mpl()
    lvl = f"{round(level * 100):g} %"
    figs = []
    fig, ax = plt.subplots(figsize=(9, 3.8), layout="constrained")
    plot_rim_profile(ax, estimate, problem, level, unit, arcs=diagnostics.gaps.arcs)
    ax.set_title("rim profile")
    figs.append((_save(plt, fig, out / "rim_profile.png"),
                 f"Rim profile: estimate and {lvl} interval, rim readings with ± sigma bars; "
                 "shaded: rim arcs with no working sensor within half a spacing."))
    fig = plt.figure(figsize=(10.5, 4.4), layout="constrained")
    plot_field_maps(fig, estimate, problem, level, unit=unit, length_unit=length_unit)
    figs.append((_save(plt, fig, out / "field_maps.png"),
                 "Interior estimate with flux lines (level sets of the harmonic conjugate; heat "
                 "flows along them) and posterior sd."))
    if threshold is not None:
        fig = plt.figure(figsize=(6, 5), layout="constrained")
        plot_exceedance(fig, estimate, problem, threshold, diagnostics.max_exceed, unit=unit,
                        length_unit=length_unit)
        figs.append((_save(plt, fig, out / "exceedance.png"),
                     f"Probability that the value exceeds {threshold:g} {unit} at each point "
                     "(contours at 0.05, 0.5, 0.95)."))
    fig = plt.figure(figsize=(15, 3.7), layout="constrained")
    plot_depth(fig, estimate, problem, diagnostics, unit)
    figs.append((_save(plt, fig, out / "depth.png"),
                 "Depth of information: harmonic n is damped by (r/R)^n inside; the highest degree "
                 "a ring of the same sensors at that radius would resolve above the noise; "
                 "per harmonic, the posterior-to-prior variance ratio (near 1: the prior "
                 "decides) and the model resolution; posterior sd against radius."))
    fig = plt.figure(figsize=(6, 5), layout="constrained")
    plot_gap_dependence(fig, estimate, problem, diagnostics, length_unit=length_unit)
    figs.append((_save(plt, fig, out / "gap_dependence.png"),
                 "Share of each point's Poisson-kernel weight that falls on unsensed rim arcs: "
                 "where this is large, the estimate there is mostly the prior's guess."))
    if diagnostics.check is not None:
        fig, ax = plt.subplots(figsize=(9, 3.6), layout="constrained")
        plot_residuals(ax, diagnostics.check)
        figs.append((_save(plt, fig, out / "residuals.png"),
                     "Residual of the fit over the noise sd, and the leave-one-out z of each "
                     "reading (its distance from what the other readings predict)."))
    post = estimate.extras.get("posterior") if estimate.extras else None
    if post is not None:
        fig = plt.figure(figsize=(9, 5.5), layout="constrained")
        if plot_traces(fig, post):
            figs.append((_save(plt, fig, out / "traces.png"),
                         "MCMC traces of the sampled hyperparameters."))
        else:
            plt.close(fig)
    return figs


def _fmt(v, digits=4):
    if v is None:
        return "—"
    if isinstance(v, (int, np.integer)):
        return str(int(v))
    try:
        f = float(v)
    except (TypeError, ValueError):
        return html.escape(str(v))
    if not np.isfinite(f):
        return "—"
    return f"{f:.{digits}g}"


_CSS = """
body{font-family:system-ui,-apple-system,'Segoe UI',sans-serif;max-width:1100px;margin:1.5em auto;
padding:0 1em;color:#1d1d1d;line-height:1.45}
h1{font-size:1.5em;margin-bottom:.2em}h2{font-size:1.15em;border-bottom:1px solid #ccc;
padding-bottom:.2em;margin-top:1.6em}
table{border-collapse:collapse;margin:.5em 0}td,th{border:1px solid #d0d0d0;padding:.25em .6em;
text-align:right}th{background:#f1f4f7}td:first-child,th:first-child{text-align:left}
.verdict{padding:.7em 1em;border-radius:4px;margin:.8em 0}
.fail{background:#fde4da;border:2px solid #b23a00;font-weight:bold}
.pass{background:#e6f0e6;border:1px solid #3c763d}.na{background:#f1f1f1;border:1px solid #999}
figure{margin:1em 0}figure img{max-width:100%;border:1px solid #e0e0e0}
figcaption{font-size:.9em;color:#444}.small{font-size:.85em;color:#555}
ul.cautions li{margin:.2em 0}
"""


def _table(header, rows):
    h = "".join(f"<th>{html.escape(str(c))}</th>" for c in header)
    body = "".join("<tr>" + "".join(f"<td>{c}</td>" for c in r) + "</tr>" for r in rows)
    return f"<table><tr>{h}</tr>{body}</table>"


def write_report(out_dir, estimate, problem, readings, *, level=0.9, unit="", length_unit="",
                 threshold=None, diagnostics=None, query=None, summary=None, title=None):
    """Write the figures and a self-contained ``report.html`` into ``out_dir``.

    Parameters
    ----------
    out_dir : Path
    estimate, problem, readings
        The fit.
    level : float, default=0.9
    unit, length_unit : str
        Units of the values and of the coordinates (shown on every axis and number).
    threshold : float, optional
        Adds the exceedance map and the probability that the maximum exceeds it.
    diagnostics : Diagnostics, optional
        From :func:`invert.diagnostics.diagnose.diagnose`; computed when omitted.
    query : tuple (points, labels), optional
    summary : dict, optional
        The summary.json content (warnings are taken from it when given).
    title : str, optional

    Returns
    -------
    Path
        The report file.
    """
    from .files import CAUTIONS

    out = Path(out_dir)
    disk = getattr(estimate.domain, "kind", "disk") != "ball"
    if diagnostics is None:
        from ..diagnostics.diagnose import diagnose

        diagnostics = diagnose(estimate, problem, level=level, threshold=threshold)
    figs = write_figures(out, estimate, problem, readings, level, unit, length_unit=length_unit,
                         diagnostics=diagnostics, threshold=threshold)
    u = f" {unit}" if unit else ""
    lvl = f"{round(level * 100):g} %"
    info = dict(estimate.info)
    parts = [f"<h1>{html.escape(title or 'rim-invert report')}</h1>",
             f"<p class='small'>Readings: {html.escape(str(readings.source))} · method "
             f"{html.escape(estimate.method)} · intervals are central {lvl} intervals · values in "
             f"{html.escape(unit or 'the readings’ unit')}, lengths in "
             f"{html.escape(length_unit or 'the unit of the radius')}.</p>"]

    # model check first: it says whether the rest can be trusted
    chk = diagnostics.check
    parts.append("<h2>Model check</h2>")
    if chk is None:
        parts.append("<div class='verdict na'>No model check: the fit recorded no prior.</div>")
    else:
        cls = "fail" if chk.flagged else ("pass" if chk.flagged is False else "na")
        parts.append(f"<div class='verdict {cls}' id='verdict'>{html.escape(chk.verdict)}</div>")
        parts.append(f"<p class='small'>The check treats the readings as a harmonic field plus "
                     f"noise under the smoothness prior, with {html.escape(chk.hyperparameters)}"
                     f" (τ = {_fmt(chk.tau, 3)}{u}); α = {chk.alpha:g}, split between the "
                     "residual and source tests.</p>")
        for n in chk.notes:
            parts.append(f"<p class='small'>Note: {html.escape(n)}</p>")
    warn = list(summary["warnings"]) if summary is not None else \
        list(estimate.warnings) + list(diagnostics.warnings)
    if warn:
        parts.append("<h2>Warnings</h2><ul>" + "".join(f"<li>{html.escape(w)}</li>" for w in warn)
                     + "</ul>")

    parts.append("<h2>Summary</h2>")
    if chk is not None and chk.flagged:
        parts.append("<div class='verdict fail'>The intervals below assume a source-free "
                     "harmonic field, which the model check rejects: they are too narrow and "
                     "must not be relied on.</div>")
    d = estimate.domain
    lu = f" {length_unit}" if length_unit else ""
    c0 = np.asarray(d.center, float)[None, :]

    def where(p):
        return "(" + ", ".join(_fmt(v, 3) for v in p) + f"{lu})"

    rows = []
    has_centre = query is not None and np.any(
        np.linalg.norm(np.asarray(query[0], float) - c0, axis=1) < 1e-9 * d.radius)
    if not has_centre:
        s = estimate.at(c0, level)
        rows.append([f"centre {where(c0[0])}", _fmt(s.mean[0]), _fmt(s.sd[0], 3),
                     f"{_fmt(s.lower[0])} to {_fmt(s.upper[0])}"])
    if disk:
        b = estimate.boundary(720, level)
        i, j = int(np.argmax(b["mean"])), int(np.argmin(b["mean"]))
        for name, k in (("rim maximum of the estimate", i), ("rim minimum of the estimate", j)):
            rows.append([f"{name} (θ = {b['theta_deg'][k]:.1f}°)", _fmt(b["mean"][k]),
                         _fmt(b["sd"][k], 3), f"{_fmt(b['lower'][k])} to {_fmt(b['upper'][k])}"])
    if query is not None:
        qp, ql = query
        qs = estimate.at(qp, level)
        for k, lab in enumerate(ql):
            rows.append([f"{html.escape(str(lab))} {where(qp[k])}", _fmt(qs.mean[k]),
                         _fmt(qs.sd[k], 3), f"{_fmt(qs.lower[k])} to {_fmt(qs.upper[k])}"])
    parts.append(_table(["where", f"estimate{u}", f"sd{u}", f"{lvl} interval{u}"], rows))
    mx = diagnostics.max_exceed
    if mx is not None:
        parts.append(
            f"<p>Probability that the value exceeds <b>{mx.threshold:g}{u}</b> anywhere in the "
            f"region: <b>{mx.probability:.3f}</b> (Monte-Carlo sd {mx.mc_se:.3f}, {mx.n_draws} "
            f"posterior draws; by the maximum principle the maximum lies on the rim, so each "
            f"draw's maximum is taken over {mx.n_rim} rim points). The maximum itself: median "
            f"{mx.max_median:.4g}{u}, {lvl} interval {mx.max_lower:.4g} to {mx.max_upper:.4g}{u}."
            "</p>")
    fit_rows = [["method", html.escape(estimate.method)]]
    for k, label in (("rule", "parameter rule"), ("lam", "regularisation parameter λ"),
                     ("s", "smoothness order s"), ("tau", f"prior scale τ{u}"),
                     ("noise_sd", f"estimated noise sd{u}"), ("effective_dof",
                                                               "effective degrees of freedom"),
                     ("chi2", "χ² of the residuals alone"), ("residual_dof", "residual dof")):
        if info.get(k) is not None:
            fit_rows.append([label, _fmt(info[k])])
    fit_rows.append(["readings used / sensors without reading",
                     f"{problem.n_readings} / {len(problem.gap_sensor)}"])
    if len(problem.gap_sensor):
        fit_rows.append(["sensors without reading",
                         html.escape(", ".join(map(str, problem.gap_sensor)))])
    parts.append(_table(["fit", "value"], fit_rows))
    if disk and diagnostics.resolution is not None:
        rd = diagnostics.resolved_degree_at
        parts.append("<p>Depth of information — highest harmonic degree a ring of these "
                     f"{problem.n_readings} sensors resolves at relative radius r/R: " +
                     ", ".join(f"{k}: {v}" for k, v in rd.items()) + ". Effective degrees of "
                     f"freedom {diagnostics.resolution.effective_dof:.1f}.</p>")
    g = diagnostics.gaps
    if disk and g is not None:
        if len(g.arcs):
            arcs = "; ".join(f"{a:.0f}° to {b:.0f}°" for a, b in np.rad2deg(g.arcs))
            parts.append(f"<p>Unsensed rim arcs (farther than half a sensor spacing from any "
                         f"working rim sensor): {arcs}.</p>")
        else:
            parts.append("<p>Every part of the rim is within half a sensor spacing of a working "
                         "sensor.</p>")
        labels = diagnostics.gap_labels or [f"p{k}" for k in range(len(g.share))]
        lu = f" {length_unit}" if length_unit else ""
        rows = [[f"{html.escape(str(lab))} ({_fmt(p[0], 3)}, {_fmt(p[1], 3)}{lu})",
                 f"{100 * sh:.1f} %", f"{w:.0f}°"]
                for lab, p, sh, w in zip(labels, g.points, g.share, g.half_mass_width_deg)]
        parts.append(_table(["dependence on gaps at", "kernel weight on unsensed arcs",
                             "width of the rim arc holding half the weight"], rows))
    parts.append("<h2>Figures</h2>")
    for path, cap in figs:
        data = base64.b64encode(Path(path).read_bytes()).decode("ascii")
        parts.append(f"<figure><img alt='{html.escape(Path(path).stem)}' "
                     f"src='data:image/png;base64,{data}'><figcaption>{html.escape(cap)}"
                     "</figcaption></figure>")
    parts.append("<h2>Cautions</h2><ul class='cautions'>" +
                 "".join(f"<li>{html.escape(c)}</li>" for c in CAUTIONS) + "</ul>")
    parts.append("<p class='small'>Made by rim-invert. Method references are in the "
                 "documentation of each stage.</p>")
    doc = ("<!DOCTYPE html><html lang='en'><head><meta charset='utf-8'>"
           f"<title>{html.escape(title or 'rim-invert report')}</title><style>{_CSS}</style>"
           "</head><body>" + "\n".join(parts) + "</body></html>")
    path = out / "report.html"
    path.write_text(doc, encoding="utf-8")
    return path
