"""Figures of a fit on a disk: rim profile, interior maps, exceedance, depth, gaps.

matplotlib is imported inside the functions that draw (:func:`~invert.report.plots.mpl_pyplot`).
:data:`invert.report.figures.FIGURES` maps :class:`~invert.geometry.disk.Disk` (and so any
subclass) to :func:`write_figures_disk`.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np

from .plots import (
    BAND,
    GAP,
    LENGTH,
    LINE,
    MANY_SENSORS,
    READ,
    VALUE,
    WARN,
    axis_label,
    check_and_trace_figures,
    mpl_pyplot,
    save_figure,
)

__all__ = ["write_figures_disk", "plot_rim_profile", "plot_field_maps", "plot_exceedance",
           "plot_depth", "plot_gap_dependence"]


def _rim_circle(ax, domain, **kw):
    th = np.linspace(0, 2 * np.pi, 400)
    ax.plot(domain.center[0] + domain.radius * np.cos(th),
            domain.center[1] + domain.radius * np.sin(th), **kw)


def _sensor_marks(ax, problem, legend=True):
    many = len(problem.points) > MANY_SENSORS  # dense sensing: small rasterised points
    ax.plot(problem.points[:, 0], problem.points[:, 1], "o", ms=1.5 if many else 4, mfc="w",
            mec="k", rasterized=many, label="sensor with reading" if legend else None)
    if problem.gap_points is not None and len(problem.gap_points):
        ax.plot(problem.gap_points[:, 0], problem.gap_points[:, 1], "x", ms=6, color=WARN,
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
    """Plot the rim profile with its band, readings and unsensed arcs.

    Rim profile: mean, central band at ``level``, rim readings (with ±sigma bars), unsensed
    arcs shaded and failed sensors marked.
    """
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
                ax.axvspan(max(lo, 0), min(hi, 360), color=GAP, alpha=0.7, lw=0,
                           label="no working sensor nearby" if first else None)
                first = False
    ax.fill_between(t, close("lower"), close("upper"), color=BAND,
                    label=f"{round(level * 100):g} % interval")
    ax.plot(t, close("mean"), color=LINE, lw=1.5, label="estimate")
    rho, th = domain.to_polar(problem.points)
    rim = rho > 0.999
    err = problem.sigma[rim] if problem.sigma is not None else None
    limits = None
    if err is not None:
        # a huge sigma (a reading marked as nearly worthless) would stretch the axis to
        # ~1e300 and overflow matplotlib's transforms: bars longer than the band's span run
        # off the axis, which is sized by the band and the shorter bars
        span = max(np.ptp(np.concatenate([b["lower"], b["upper"], problem.y[rim]])),
                   np.finfo(float).tiny)
        short = err <= span
        ends = np.concatenate([b["lower"], b["upper"], problem.y[rim],
                               (problem.y[rim] - err)[short], (problem.y[rim] + err)[short]])
        if not short.all():
            limits = (ends.min() - 0.05 * np.ptp(ends), ends.max() + 0.05 * np.ptp(ends))
        err = np.minimum(err, 2 * span)
    if rim.sum() > MANY_SENSORS:  # dense sensing: points only (bars would hide the band)
        ax.plot(np.rad2deg(np.mod(th[rim], 2 * np.pi)), problem.y[rim], ".", ms=1.5,
                color="grey", alpha=0.4, rasterized=True, zorder=1, label="rim reading")
    else:
        ax.errorbar(np.rad2deg(np.mod(th[rim], 2 * np.pi)), problem.y[rim], yerr=err,
                    fmt="o", ms=4, color=READ, label="rim reading (± sigma)")
    if problem.gap_points is not None and len(problem.gap_points):
        gr, gt = domain.to_polar(problem.gap_points)
        gdeg = np.rad2deg(np.mod(gt[gr > 0.999], 2 * np.pi))
        ax.plot(gdeg, np.full(gdeg.shape, np.nanmin(b["lower"])), "x", color=WARN, mew=1.5,
                label="sensor without reading")
    ax.set_xlim(0, 360)
    if limits is not None:
        ax.set_ylim(*limits)
    ax.set_xticks(range(0, 361, 45))
    ax.set_xlabel("rim angle θ (degrees, counter-clockwise from +x)")
    ax.set_ylabel(axis_label("value on the rim", unit, VALUE))
    ax.legend(loc="best", fontsize=7)


def plot_field_maps(fig, estimate, problem, level=0.9, n=121, unit="", length_unit=""):
    """Interior mean with flux lines (level sets of the harmonic conjugate) and posterior sd."""
    domain = estimate.domain
    xs, ys, pts, inside = _grid_map(estimate, n)
    s = estimate.grid_map(xs, ys, level)  # (n, n) maps, NaN outside
    coef = estimate.mean if estimate.draws is None else estimate.draws.mean(axis=0)
    stream = _full(inside, domain.conjugate(coef, pts[inside]))
    axes = fig.subplots(1, 2)
    for ax, data, title, cmap in ((axes[0], s.mean, "estimated field", "magma"),
                                  (axes[1], s.sd, "posterior sd", "cividis")):
        im = ax.pcolormesh(xs, ys, data, cmap=cmap, shading="auto")
        fig.colorbar(im, ax=ax, shrink=0.8, label=axis_label(title, unit, VALUE))
        _rim_circle(ax, domain, color="k", lw=0.8)
        _sensor_marks(ax, problem, legend=ax is axes[1])
        ax.set_aspect("equal")
        ax.set_title(title)
        ax.set_xlabel(axis_label("x", length_unit, LENGTH))
        ax.set_ylabel(axis_label("y", length_unit, LENGTH))
    axes[0].contour(xs, ys, stream.reshape(n, n), levels=16, colors="#e8f1f8", linewidths=0.6,
                    negative_linestyles="solid")
    axes[0].set_title("estimated field, with flux lines")
    axes[1].legend(loc="lower right", fontsize=7)


#: Probability contours drawn on the exceedance map, where the map reaches them.
EXCEEDANCE_LEVELS = (0.001, 0.01, 0.05, 0.25, 0.5, 0.75, 0.95, 0.99)


def exceedance_levels(p, levels=EXCEEDANCE_LEVELS):
    """Return the contour levels of ``levels`` that the probability map ``p`` crosses."""
    p = np.asarray(p, float)
    p = p[np.isfinite(p)]
    if not p.size:
        return []
    return [v for v in levels if p.min() < v < p.max()]


def plot_exceedance(fig, estimate, problem, threshold, max_exceed=None, n=101, unit="",
                    length_unit=""):
    """Map of the probability that the field exceeds ``threshold``, with contours.

    The colour scale is logarithmic from 0.001 to 1 (smaller probabilities get the lightest
    colour), so that small but non-zero probabilities are visible; the rim, where the maximum
    lies, is drawn as a ring in the same colours with its largest value marked; contours are
    drawn at the levels of :data:`EXCEEDANCE_LEVELS` the map crosses. Returns those levels.
    """
    from matplotlib.collections import LineCollection
    from matplotlib.colors import LogNorm

    from ..diagnostics.diagnose import exceedance_probability

    domain = estimate.domain
    xs, ys, pts, inside = _grid_map(estimate, n)
    p = _full(inside, exceedance_probability(estimate, pts[inside], threshold)).reshape(n, n)
    floor = EXCEEDANCE_LEVELS[0]
    ax = fig.subplots()
    im = ax.pcolormesh(xs, ys, np.clip(p, floor, 1.0), cmap="Reds",
                       norm=LogNorm(vmin=floor, vmax=1.0), shading="auto")
    u = f" {unit}" if unit else ""
    cb = fig.colorbar(im, ax=ax, shrink=0.85)
    cb.set_label(f"P(value > {threshold:g}{u}) (log scale; ≤ {floor:g} lightest)")
    ticks = [0.001, 0.01, 0.05, 0.25, 1.0]
    cb.set_ticks(ticks, labels=[f"{t:g}" for t in ticks])
    # the rim, where the maximum lies (maximum principle), as a ring in the same colours
    th = np.linspace(0, 2 * np.pi, 721)
    rim = domain.center + domain.radius * np.column_stack([np.cos(th), np.sin(th)])
    p_rim = exceedance_probability(estimate, rim, threshold)
    seg = np.stack([rim[:-1], rim[1:]], axis=1)
    ring = LineCollection(seg, cmap="Reds", norm=im.norm, linewidths=6, capstyle="butt")
    ring.set_array(np.clip(0.5 * (p_rim[:-1] + p_rim[1:]), floor, 1.0))
    ax.add_collection(ring)
    levels = exceedance_levels(np.append(p[np.isfinite(p)], p_rim))
    if levels:
        cs = ax.contour(xs, ys, p, levels=levels, colors="k", linewidths=0.8)
        ax.clabel(cs, fmt="%g", fontsize=7)
        cb.add_lines(cs)
    _rim_circle(ax, domain, color="k", lw=0.6)
    _sensor_marks(ax, problem)
    k = int(np.argmax(p_rim))
    pmax = float(max(np.nanmax(p), p_rim[k]))
    inward = domain.center + 0.7 * (rim[k] - domain.center)
    if p_rim[k] < 0.25:  # a small spot: point the reader at it
            ax.annotate(f"largest: {p_rim[k]:.2g}", rim[k], xytext=inward, fontsize=8,
                    ha="left" if rim[k][0] < domain.center[0] else "right",
                    arrowprops={"arrowstyle": "->", "lw": 0.8})
    title = f"probability of exceeding {threshold:g}{u}"
    title += f"\nlargest at a point: {pmax:.2g}"
    if max_exceed is not None:
        title += f"; anywhere in the disk: {max_exceed.probability:.3f}"
    ax.set_title(title, fontsize=10)
    ax.set_aspect("equal")
    ax.set_xlabel(axis_label("x", length_unit, LENGTH))
    ax.set_ylabel(axis_label("y", length_unit, LENGTH))
    ax.legend(loc="lower right", fontsize=7)
    return levels


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
        ax.step(rr, resolved_degree(estimate, rr, n_readings=problem.n_readings), color=LINE,
                where="mid")
        ax.set_xlabel("relative radius r/R of a sensor ring")
        ax.set_ylabel("highest resolved degree n")
        ax.set_title(f"resolved by {problem.n_readings} sensors")
        ax = axes[2]
        # Show the degrees where the data matter, and a few beyond (the rest is prior).
        low = np.flatnonzero(res.resolution < 0.02)
        top = int(min(res.degree[-1], max(12, 2 * low[0] if low.size else res.degree[-1])))
        k = res.degree <= top
        ax.bar(res.degree[k], res.variance_ratio[k], color=BAND, edgecolor=LINE,
               label="posterior / prior variance")
        ax.plot(res.degree[k], res.resolution[k], "o-", color=WARN, ms=3, label="resolution")
        ax.axhline(0.5, color="grey", lw=0.7, ls=":")
        ax.set_ylim(0, 1.05)
        ax.set_xlabel("harmonic degree n" + (f" (up to {top} of {res.degree[-1]})"
                                              if top < res.degree[-1] else ""))
        ax.set_title(f"per harmonic (effective dof {res.effective_dof:.1f})")
        # below the axes: bars rise and the resolution falls across the whole width
        ax.legend(fontsize=7, loc="upper center", bbox_to_anchor=(0.5, -0.2), ncol=2)
    else:
        for ax in axes[1:3]:
            ax.set_axis_off()
        axes[1].text(0.5, 0.5, "no prior recorded:\nresolution not available", ha="center")
    ax = axes[3]
    rp = diagnostics.radial
    ax.fill_between(rp.rho, rp.min_sd, rp.max_sd, color=BAND, label="range over angle")
    ax.plot(rp.rho, rp.rms_sd, color=LINE, label="rms over angle")
    ax.set_xlabel("relative radius r/R")
    ax.set_ylabel(axis_label("posterior sd", unit, VALUE))
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
                domain.center[1] + domain.radius * np.sin(th), color=WARN, lw=4,
                solid_capstyle="butt", label="unsensed arc" if k == 0 else None)
    _sensor_marks(ax, problem)
    ax.set_aspect("equal")
    ax.set_title("how much the estimate rests on unsensed rim arcs", fontsize=10)
    ax.set_xlabel(axis_label("x", length_unit, LENGTH))
    ax.set_ylabel(axis_label("y", length_unit, LENGTH))
    ax.legend(loc="lower right", fontsize=7)




def write_figures_disk(out_dir, estimate, problem, readings=None, level=0.9, unit="", *,
                  length_unit="", diagnostics=None, threshold=None):
    """Write the figures of a fit on a disk into ``out_dir``; return ``[(path, caption), ...]``.

    Rim profile, interior maps with flux lines, exceedance (with ``threshold``), depth of
    information, dependence on gaps, residuals and (for a sampled posterior) MCMC traces.
    """
    out = Path(out_dir)
    if diagnostics is None:
        from ..diagnostics.diagnose import diagnose

        diagnostics = diagnose(estimate, problem, level=level, threshold=threshold)
    plt = mpl_pyplot()
    lvl = f"{round(level * 100):g} %"
    figs = []
    fig, ax = plt.subplots(figsize=(9, 3.8), layout="constrained")
    plot_rim_profile(ax, estimate, problem, level, unit, arcs=diagnostics.gaps.arcs)
    ax.set_title("rim profile")
    figs.append((save_figure(plt, fig, out / "rim_profile.png"),
                 f"Rim profile: estimate and {lvl} interval, rim readings with ± sigma bars; "
                 "shaded: rim arcs with no working sensor within half a spacing."))
    fig = plt.figure(figsize=(10.5, 4.4), layout="constrained")
    plot_field_maps(fig, estimate, problem, level, unit=unit, length_unit=length_unit)
    figs.append((save_figure(plt, fig, out / "field_maps.png"),
                 "Interior estimate with flux lines (level sets of the harmonic conjugate; heat "
                 "flows along them) and posterior sd."))
    if threshold is not None:
        fig = plt.figure(figsize=(6.4, 5.2), layout="constrained")
        levels = plot_exceedance(fig, estimate, problem, threshold, diagnostics.max_exceed,
                                 unit=unit, length_unit=length_unit)
        drawn = (f"contours at {', '.join(f'{v:g}' for v in levels)}" if levels else
                 f"no contour: the map crosses none of the levels "
                 f"{', '.join(f'{v:g}' for v in EXCEEDANCE_LEVELS)}")
        figs.append((save_figure(plt, fig, out / "exceedance.png"),
                     f"Probability that the value exceeds the threshold {threshold:g}"
                     f"{' ' + unit if unit else ''} at each point, on a logarithmic colour "
                     f"scale ({drawn})."))
    fig = plt.figure(figsize=(15, 3.7), layout="constrained")
    plot_depth(fig, estimate, problem, diagnostics, unit)
    figs.append((save_figure(plt, fig, out / "depth.png"),
                 "Depth of information: harmonic n is damped by (r/R)^n inside; the highest degree "
                 "a ring of the same sensors at that radius would resolve above the noise; "
                 "per harmonic, the posterior-to-prior variance ratio (near 1: the prior "
                 "decides) and the model resolution; posterior sd against radius."))
    fig = plt.figure(figsize=(6, 5), layout="constrained")
    plot_gap_dependence(fig, estimate, problem, diagnostics, length_unit=length_unit)
    figs.append((save_figure(plt, fig, out / "gap_dependence.png"),
                 "Share of each point's Poisson-kernel weight that falls on unsensed rim arcs: "
                 "where this is large, the estimate there is mostly the prior's guess."))
    figs += check_and_trace_figures(plt, out, estimate, diagnostics.check,
                                    "; histograms of all kept posterior draws")
    return figs
