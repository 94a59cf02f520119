"""The self-contained HTML report of a fit.

Every figure (chosen per domain by :mod:`invert.report.figures`) is written as a PNG beside the
report and embedded in ``report.html`` as base64, so the report is one file that opens
anywhere, with no script and no network access. Sections ask the diagnostics and the domain
(``rim_arcs`` for the rim extremes by angle), never the domain's kind.
"""

from __future__ import annotations

import base64
import html
from pathlib import Path

import numpy as np

from .disk_figures import (
    plot_depth,
    plot_exceedance,
    plot_field_maps,
    plot_gap_dependence,
    plot_rim_profile,
)
from .figures import write_figures
from .plots import plot_residuals, plot_traces, visible

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


def _esc(text):
    """Return a user string as HTML text: control characters made visible, then escaped."""
    return html.escape(visible(text))


def _fmt(v, digits=4):
    if v is None:
        return "—"
    if isinstance(v, (int, np.integer)):
        return str(int(v))
    try:
        f = float(v)
    except (TypeError, ValueError):
        return _esc(v)
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
    # header and rows are HTML already: every user string is escaped where it enters
    h = "".join(f"<th>{c}</th>" for c in header)
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
    if diagnostics is None:
        from ..diagnostics.diagnose import diagnose

        diagnostics = diagnose(estimate, problem, level=level, threshold=threshold)
    from ..diagnostics.heat_flow import heat_flow

    conductivity = ((summary or {}).get("heat_flow") or {}).get("conductivity")
    flow = heat_flow(estimate, conductivity, level)  # None: no bore, no net flow
    figs = write_figures(out, estimate, problem, readings, level, unit, length_unit=length_unit,
                         diagnostics=diagnostics, threshold=threshold, conductivity=conductivity)
    # user strings are escaped once, here; everything below receives HTML-safe text
    u = f" {_esc(unit)}" if unit else ""
    length_unit = _esc(length_unit or "")
    lvl = f"{round(level * 100):g} %"
    parts = [f"<h1>{_esc(title or 'rim-invert report')}</h1>",
             f"<p class='small'>Readings: {_esc(readings.source)} · method "
             f"{_esc(estimate.method)} · intervals are central {lvl} intervals · values in "
             f"{_esc(unit) if unit else 'the readings’ unit'}, lengths in "
             f"{length_unit or 'the unit of the radius'}.</p>"]
    # model check first: it says whether the rest can be trusted; then warnings and the
    # cautions, all before the numbers a reader acts on
    parts += _check_section(diagnostics.check, u)
    warn = list(summary["warnings"]) if summary is not None else \
        list(estimate.warnings) + list(diagnostics.warnings)
    if warn:
        parts.append("<h2>Warnings</h2><ul>" + "".join(f"<li>{_esc(w)}</li>" for w in warn)
                     + "</ul>")
    parts.append("<h2 id='cautions'>Cautions</h2><ul class='cautions'>" +
                 "".join(f"<li>{html.escape(c)}</li>" for c in CAUTIONS) + "</ul>")
    parts.append("<h2>Summary</h2>")
    if diagnostics.check is not None and diagnostics.check.flagged:
        parts.append("<div class='verdict fail'>The intervals below assume a source-free "
                     "harmonic field, which the model check rejects: they are too narrow and "
                     "must not be relied on.</div>")
    parts.append(_table(["where", f"estimate{u}", f"sd{u}", f"{lvl} interval{u}"],
                        _summary_rows(estimate, level, query, length_unit)))
    parts += _exceedance_section(diagnostics.max_exceed, u, lvl)
    parts += _heat_flow_section(flow, lvl)
    parts.append(_table(["fit", "value"], _fit_rows(estimate, problem, u)))
    parts += _depth_section(diagnostics, problem)
    parts += _gap_section(diagnostics, length_unit)
    parts += _rim_sections(diagnostics, problem, length_unit)
    parts.append("<h2>Figures</h2>")
    for path, cap in figs:
        data = base64.b64encode(Path(path).read_bytes()).decode("ascii")
        parts.append(f"<figure><img alt='{html.escape(Path(path).stem)}' "
                     f"src='data:image/png;base64,{data}'><figcaption>{html.escape(cap)}"
                     "</figcaption></figure>")
    parts.append("<p class='small'>Made by rim-invert. Method references are in the "
                 "documentation of each stage.</p>")
    doc = ("<!DOCTYPE html><html lang='en'><head><meta charset='utf-8'>"
           f"<title>{_esc(title or 'rim-invert report')}</title><style>{_CSS}</style>"
           "</head><body>" + "\n".join(parts) + "</body></html>")
    path = out / "report.html"
    path.write_text(doc, encoding="utf-8")
    return path


def _check_section(chk, u):
    parts = ["<h2>Model check</h2>"]
    if chk is None:
        parts.append("<div class='verdict na'>No model check: the fit recorded no prior.</div>")
        return parts
    cls = "fail" if chk.flagged else ("pass" if chk.flagged is False else "na")
    parts.append(f"<div class='verdict {cls}' id='verdict'>{_esc(chk.verdict)}</div>")
    parts.append(f"<p class='small'>The check treats the readings as a harmonic field plus "
                 f"noise under the smoothness prior, with {html.escape(chk.hyperparameters)}"
                 f" (τ = {_fmt(chk.tau, 3)}{u}); α = {chk.alpha:g}, split between the "
                 "residual and source tests.</p>")
    for n in chk.notes:
        parts.append(f"<p class='small'>Note: {_esc(n)}</p>")
    return parts


def _summary_rows(estimate, level, query, length_unit):
    # The domain's reference points (the centre of a disk) unless queried, rim extremes by
    # angle (domains with rim_arcs), query points.
    d = estimate.domain
    lu = f" {length_unit}" if length_unit else ""

    def where(p):
        return "(" + ", ".join(_fmt(v, 3) for v in p) + f"{lu})"

    rows = []
    for name, point in d.reference_points():
        c0 = np.asarray(point, float)[None, :]
        if query is not None and np.any(
                np.linalg.norm(np.asarray(query[0], float) - c0, axis=1) < 1e-9 * d.radius):
            continue
        s = estimate.at(c0, level)
        rows.append([f"{_esc(name)} {where(c0[0])}", _fmt(s.mean[0]), _fmt(s.sd[0], 3),
                     f"{_fmt(s.lower[0])} to {_fmt(s.upper[0])}"])
    if d.rim_arcs is not None:  # a rim parametrised by the angle theta
        b = estimate.boundary(720, level)
        i, j = int(np.argmax(b["mean"])), int(np.argmin(b["mean"]))
        for name, k in (("rim maximum of the estimate", i), ("rim minimum of the estimate", j)):
            rows.append([f"{name} (θ = {b['theta_deg'][k]:.1f}°)", _fmt(b["mean"][k]),
                         _fmt(b["sd"][k], 3), f"{_fmt(b['lower'][k])} to {_fmt(b['upper'][k])}"])
    if query is not None:
        qp, ql = query
        qs = estimate.at(qp, level)
        for k, lab in enumerate(ql):
            rows.append([f"{_esc(lab)} {where(qp[k])}", _fmt(qs.mean[k]),
                         _fmt(qs.sd[k], 3), f"{_fmt(qs.lower[k])} to {_fmt(qs.upper[k])}"])
    return rows


def _exceedance_section(mx, u, lvl):
    if mx is None:
        return []
    return [f"<p>Probability that the value exceeds <b>{mx.threshold:g}{u}</b> anywhere in the "
            f"region: <b>{mx.probability:.3f}</b> (Monte-Carlo sd {mx.mc_se:.3f}, {mx.n_draws} "
            f"posterior draws; by the maximum principle the maximum lies on the rim, so each "
            f"draw's maximum is taken over {mx.n_rim} rim points). The maximum itself: median "
            f"{mx.max_median:.4g}{u}, {lvl} interval {mx.max_lower:.4g} to {mx.max_upper:.4g}{u}."
            "</p>"]


def _heat_flow_section(flow, lvl):
    if flow is None:
        return []
    return [f"<p>Net heat flow through the wall per unit length, radially outward: "
            f"<b>{flow.mean:.5g}</b> {html.escape(flow.unit)} (sd {flow.sd:.3g}, {lvl} interval "
            f"{flow.lower:.5g} to {flow.upper:.5g}); the same through every circle of a "
            "source-free wall. Flux densities on each rim: rim_flux.csv.</p>"]


def _fit_rows(estimate, problem, u):
    info = dict(estimate.info)
    rows = [["method", _esc(estimate.method)]]
    for k, label in (("rule", "parameter rule"), ("lam", "regularisation parameter λ"),
                     ("s", "smoothness order s"), ("tau", f"prior scale τ{u}"),
                     ("noise_sd", f"estimated noise sd{u}"), ("effective_dof",
                                                               "effective degrees of freedom"),
                     ("chi2", "χ² of the residuals alone"), ("residual_dof", "residual dof")):
        if info.get(k) is not None:
            rows.append([label, _fmt(info[k])])
    cal = info.get("calibration")
    if cal:
        how = (f"intervals widened: covariance × {cal['factor']:.3g}" if cal["factor"] > 1
               else "no widening needed")
        rows.append(["held-out check (blocks of nearby readings left out in turn)",
                     f"mean squared standardised error {cal['mean_z2']:.3g} (threshold "
                     f"{cal['threshold']:.3g}): {how}"])
    rows.append(["readings used / sensors without reading",
                 f"{problem.n_readings} / {len(problem.gap_sensor)}"])
    if len(problem.gap_sensor):
        rows.append(["sensors without reading",
                     _esc(", ".join(map(str, problem.gap_sensor)))])
    return rows


def _depth_section(diagnostics, problem):
    if diagnostics.resolution is None:
        return []
    rd = diagnostics.resolved_degree_at
    if not rd:  # several rims: reported rim by rim (_rim_sections)
        return []
    return ["<p>Depth of information — highest harmonic degree a ring of these "
            f"{problem.n_readings} sensors resolves at relative radius r/R: " +
            ", ".join(f"{k}: {v}" for k, v in rd.items()) + ". Effective degrees of "
            f"freedom {diagnostics.resolution.effective_dof:.1f}.</p>"]


def _gap_section(diagnostics, length_unit):
    g = diagnostics.gaps
    if g is None:
        return []
    parts = []
    if len(g.arcs):
        arcs = "; ".join(f"{a:.0f}° to {b:.0f}°" for a, b in np.rad2deg(g.arcs))
        parts.append(f"<p>Unsensed rim arcs (farther than half a sensor spacing from any "
                     f"working rim sensor): {arcs}.</p>")
    else:
        parts.append("<p>Every part of the rim is within half a sensor spacing of a working "
                     "sensor.</p>")
    labels = diagnostics.gap_labels or [f"p{k}" for k in range(len(g.share))]
    lu = f" {length_unit}" if length_unit else ""
    rows = [[f"{_esc(lab)} ({_fmt(p[0], 3)}, {_fmt(p[1], 3)}{lu})",
             f"{100 * sh:.1f} %", f"{w:.0f}°"]
            for lab, p, sh, w in zip(labels, g.points, g.share, g.half_mass_width_deg)]
    parts.append(_table(["dependence on gaps at", "kernel weight on unsensed arcs",
                         "width of the rim arc holding half the weight"], rows))
    return parts


def _rim_sections(diagnostics, problem, length_unit):
    # Gaps and depth of information rim by rim (a region with several rim circles).
    r = diagnostics.rims
    if r is None:
        return []
    parts = []
    for name in r.names:
        arcs = r.arcs[name]
        if len(arcs) == 1 and arcs[0, 1] - arcs[0, 0] >= 2 * np.pi - 1e-12:
            text = f"no working sensor on the {name} rim: all of it is unsensed"
        elif len(arcs):
            text = f"unsensed arcs of the {name} rim (farther than half its sensor spacing " \
                   "from its working sensors): " + "; ".join(
                       f"{a:.0f}° to {b:.0f}°" for a, b in np.rad2deg(arcs))
        else:
            text = f"every part of the {name} rim is within half a sensor spacing of a " \
                   "working sensor"
        parts.append(f"<p>{_esc(text[0].upper() + text[1:])}.</p>")
    if r.resolved_degree:
        fr = list(r.resolved_degree[r.names[0]])
        rows = [[_esc(name)] + [str(r.resolved_degree[name][f]) for f in fr] for name in r.names]
        parts.append(f"<p>Depth of information from each rim — highest degree of that rim's "
                     f"function a ring of these {problem.n_readings} sensors resolves at a "
                     "fraction of the wall away from the rim (0: on the rim, 1: on the other "
                     "rim). Effective degrees of freedom "
                     f"{diagnostics.resolution.effective_dof:.1f}.</p>")
        parts.append(_table(["rim"] + [f"depth {f}" for f in fr], rows))
    lu = f" {length_unit}" if length_unit else ""
    rows = [[f"{_esc(lab)} ({_fmt(p[0], 3)}, {_fmt(p[1], 3)}{lu})"] +
            [f"{100 * r.share[name][i]:.1f} %" for name in r.names]
            for i, (lab, p) in enumerate(zip(r.labels, r.points))]
    parts.append(_table(["dependence on gaps at"] + [f"weight on unsensed arcs of the {n} rim"
                                                     for n in r.names], rows))
    return parts
