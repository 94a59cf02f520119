"""Figures of a fit on an annulus (a wall): both rim profiles, the wall map, rim flux densities.

matplotlib is imported inside the functions that draw (:func:`~invert.report.plots.mpl_pyplot`).
:data:`invert.report.figures.FIGURES` maps :class:`~invert.geometry.annulus.Annulus` to
:func:`write_figures_annulus`. Everything the figures need is asked of the domain (``rim_grid``,
``wall_rings``, ``polar_grid``, ``to_polar``) and of the estimate.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np

from .plots import (
    BAND,
    LENGTH,
    LINE,
    READ,
    VALUE,
    WARN,
    axis_label,
    check_and_trace_figures,
    mpl_pyplot,
    save_figure,
)

__all__ = ["write_figures_annulus", "plot_rim_profiles", "plot_wall_maps", "plot_rim_flux",
           "plot_rim_depth"]

#: Relative distance (of the outer radius) within which a sensor is drawn on a rim's profile.
ON_RIM = 1e-3


def _on(domain, points, rim):
    rho, th = domain.to_polar(points)
    target = 1.0 if rim == "outer" else domain.inner_relative_radius
    return np.abs(rho - target) <= ON_RIM, np.rad2deg(np.mod(th, 2 * np.pi))


def _profile(ax, frame, rim, label, ylabel):
    part = frame[frame["rim"] == rim]
    t = part["theta_deg"].to_numpy()
    ax.fill_between(t, part["lower"], part["upper"], color=BAND, label=label)
    ax.plot(t, part["mean"], color=LINE, lw=1.5, label="estimate")
    ax.set_xlim(0, 360)
    ax.set_xticks(range(0, 361, 45))
    ax.set_ylabel(ylabel)


def _shade_arcs(ax, arcs, label):
    # Unsensed arcs (radians, ccw, the end may pass 2 pi) as grey spans on a 0-360 deg axis.
    first = True
    for a, e in np.rad2deg(np.asarray(arcs, float).reshape(-1, 2)):
        a = a % 360.0
        e = a + (e - a if e - a <= 360.0 else 360.0)
        for lo, hi in ((a, min(e, 360.0)), (0.0, e - 360.0)):
            if hi > lo:
                ax.axvspan(lo, hi, color="0.88", zorder=0, label=label if first else None)
                first = False


def plot_rim_profiles(fig, estimate, problem, level=0.9, unit="", arcs=None):
    """Outer and inner rim profiles with their bands, the readings on each and failed sensors.

    ``arcs``: rim name -> unsensed arcs (radians), shaded grey (``RimDiagnostics.arcs``).
    """
    domain = estimate.domain
    b = estimate.boundary(720, level)
    axes = fig.subplots(2, 1, sharex=True)
    lvl = f"{round(level * 100):g} % interval"
    for ax, rim in zip(axes, ("outer", "inner"), strict=True):
        if arcs is not None and len(arcs.get(rim, ())):
            _shade_arcs(ax, arcs[rim], "unsensed arc")
        _profile(ax, b, rim, lvl, axis_label(f"value on the {rim} rim", unit, VALUE))
        on, deg = _on(domain, problem.points, rim)
        err = None if problem.sigma is None else problem.sigma[on]
        ax.errorbar(deg[on], problem.y[on], yerr=err, fmt="o", ms=4, color=READ,
                    label="reading (± sigma)")
        if problem.gap_points is not None and len(problem.gap_points):
            gon, gdeg = _on(domain, problem.gap_points, rim)
            part = b[b["rim"] == rim]
            ax.plot(gdeg[gon], np.full(int(gon.sum()), part["lower"].min()), "x", color=WARN,
                    mew=1.5, label="sensor without reading")
        ax.set_title(f"{rim} rim", fontsize=10)
        # beside the axes: inside, a legend hides readings or failed sensors
        ax.legend(loc="upper left", bbox_to_anchor=(1.01, 1.0), fontsize=7)
    axes[1].set_xlabel("angle θ (degrees, counter-clockwise from +x)")


def plot_wall_maps(fig, estimate, problem, level=0.9, n=121, unit="", length_unit=""):
    """Estimate and posterior sd on a polar grid of the wall, with the sensors."""
    domain = estimate.domain
    rho, n_t = domain.wall_rings(n)
    pts = domain.polar_grid(rho, n_t + 1)  # the angle 2 pi repeats 0: a closed map
    s = estimate.at(pts, level)
    X, Y = pts[:, 0].reshape(len(rho), -1), pts[:, 1].reshape(len(rho), -1)
    X, Y = np.column_stack([X, X[:, :1]]), np.column_stack([Y, Y[:, :1]])
    axes = fig.subplots(1, 2)
    for ax, data, title, cmap in ((axes[0], s.mean, "estimated field", "magma"),
                                  (axes[1], s.sd, "posterior sd", "cividis")):
        Z = data.reshape(len(rho), -1)
        im = ax.pcolormesh(X, Y, np.column_stack([Z, Z[:, :1]]), cmap=cmap, shading="gouraud")
        fig.colorbar(im, ax=ax, shrink=0.8, label=axis_label(title, unit, VALUE))
        for r in (rho[0], rho[-1]):
            ring = domain.polar_grid([r], 400)
            ax.plot(np.r_[ring[:, 0], ring[0, 0]], np.r_[ring[:, 1], ring[0, 1]], color="k",
                    lw=0.8)
        ax.plot(problem.points[:, 0], problem.points[:, 1], "o", ms=4, mfc="w", mec="k",
                label="sensor with reading")
        if problem.gap_points is not None and len(problem.gap_points):
            ax.plot(problem.gap_points[:, 0], problem.gap_points[:, 1], "x", ms=6, color=WARN,
                    mew=1.5, label="sensor without reading")
        ax.set_aspect("equal")
        ax.set_title(title)
        ax.set_xlabel(axis_label("x", length_unit, LENGTH))
        ax.set_ylabel(axis_label("y", length_unit, LENGTH))
        # a margin so that markers on the outer rim are not cut by the axes
        pad = 0.06 * domain.radius
        cx, cy = domain.center
        ax.set_xlim(cx - domain.radius - pad, cx + domain.radius + pad)
        ax.set_ylim(cy - domain.radius - pad, cy + domain.radius + pad)
    # below the maps: a legend inside would cover part of the wall
    axes[1].legend(loc="upper center", bbox_to_anchor=(0.5, -0.14), ncol=2, fontsize=7)


def plot_rim_flux(fig, frame, level=0.9, flux_unit=""):
    """Radially outward flux density on each rim (``rim_flux.csv``), with its band."""
    axes = fig.subplots(1, 2, sharey=False)
    lvl = f"{round(level * 100):g} % interval"
    for ax, rim in zip(axes, ("outer", "inner"), strict=True):
        _profile(ax, frame, rim, lvl, f"flux density -k du/dr ({flux_unit})")
        ax.set_title(f"{rim} rim", fontsize=10)
        ax.set_xlabel("angle θ (degrees)")
        ax.legend(loc="best", fontsize=7)


def write_figures_annulus(out_dir, estimate, problem, readings=None, level=0.9, unit="", *,
                          length_unit="", diagnostics=None, threshold=None, conductivity=None):
    """Write the figures of a fit on an annulus; return ``[(path, caption), ...]``.

    Rim profiles, wall maps, the rim flux densities, residuals and (for a sampled posterior)
    MCMC traces. ``threshold`` is not drawn (no exceedance map yet).
    """
    from ..diagnostics.heat_flow import rim_flux_profile

    out = Path(out_dir)
    plt = mpl_pyplot()
    lvl = f"{round(level * 100):g} %"
    figs = []
    fig = plt.figure(figsize=(9, 6), layout="constrained")
    rims = None if diagnostics is None else diagnostics.rims
    plot_rim_profiles(fig, estimate, problem, level, unit,
                      arcs=None if rims is None else rims.arcs)
    figs.append((save_figure(plt, fig, out / "rim_profiles.png"),
                 f"Outer and inner rim profiles: estimate and {lvl} interval, readings on each "
                 "rim with ± sigma bars, crosses: sensors without a reading"
                 + (", grey: arcs farther than half the rim's sensor spacing from its "
                    "working sensors." if rims is not None else ".")))
    fig = plt.figure(figsize=(10.5, 4.4), layout="constrained")
    plot_wall_maps(fig, estimate, problem, level, unit=unit, length_unit=length_unit)
    figs.append((save_figure(plt, fig, out / "wall_maps.png"),
                 "Estimate and posterior sd across the wall (polar grid of field.csv)."))
    if conductivity is None:
        flux_unit = "per unit conductivity"
    elif length_unit == "m":
        flux_unit = "W/m²"
    else:  # k in W/m/K times a gradient per unit of the coordinates
        flux_unit = f"W/m per {length_unit or 'unit of the radius'}"
    fig = plt.figure(figsize=(10.5, 3.6), layout="constrained")
    plot_rim_flux(fig, rim_flux_profile(estimate, conductivity, level, 360), level, flux_unit)
    figs.append((save_figure(plt, fig, out / "rim_flux.png"),
                 f"Radially outward flux density -k du/dr on each rim with its {lvl} interval "
                 "(rim_flux.csv); its integral over either circle is the net heat flow."))
    if diagnostics is not None and diagnostics.radial is not None:
        fig = plt.figure(figsize=(12, 3.6), layout="constrained")
        plot_rim_depth(fig, estimate, diagnostics, unit)
        figs.append((save_figure(plt, fig, out / "rim_depth.png"),
                     "Depth of information from each rim: how a rim's harmonic of degree n fades "
                     "across the wall (solid: from the outer rim, dashed: from the inner rim), "
                     "the posterior-to-prior variance ratio of each rim function's harmonics "
                     "(near 0: fixed by the data, near 1: prior only), and the posterior sd "
                     "against the radius."))
    check = None if diagnostics is None else diagnostics.check
    figs += check_and_trace_figures(plt, out, estimate, check)
    return figs


def plot_rim_depth(fig, estimate, diagnostics, unit=""):
    """Attenuation from each rim, variance ratio per rim and degree, posterior sd by radius."""
    d = estimate.domain
    circles = d.rim_circles
    axes = fig.subplots(1, 3)
    rho = np.linspace(d.inner_relative_radius, 1.0, 201)
    ax = axes[0]
    for n, colour in zip((1, 2, 4, 8), ("C0", "C1", "C2", "C3"), strict=True):
        for k, style in ((0, "-"), (1, "--")):
            ax.plot(rho, circles.attenuation(k, rho, [n])[:, 0], style, color=colour,
                    label=f"n = {n}" if k == 0 else None)
    ax.set_xlabel("relative radius r/b")
    ax.set_ylabel("rim harmonic n (solid: outer, dashed: inner)")
    ax.set_title("fading across the wall", fontsize=10)
    ax.legend(fontsize=7)
    ax = axes[1]
    rims = diagnostics.rims
    if rims is not None and rims.variance_ratio is not None:
        top = 0
        for k, name in enumerate(rims.names):
            ratio = rims.variance_ratio[name]
            low = np.flatnonzero(ratio > 0.98)
            top = max(top, int(min(len(ratio) - 1, max(12, 2 * low[0] if low.size else 0))))
        for k, name in enumerate(rims.names):
            ratio = rims.variance_ratio[name][: top + 1]
            ax.plot(np.arange(ratio.size), ratio, "o-" if k == 0 else "s--", ms=3,
                    label=f"{name} rim")
        ax.axhline(0.5, color="grey", lw=0.7, ls=":")
        ax.set_ylim(0, 1.05)
        ax.set_xlabel("harmonic degree n")
        ax.set_ylabel("posterior / prior variance")
        dof = diagnostics.resolution.effective_dof
        ax.set_title(f"per rim and degree (effective dof {dof:.1f})", fontsize=10)
        ax.legend(fontsize=7)
    else:
        ax.set_axis_off()
        ax.text(0.5, 0.5, "no prior recorded:\nresolution not available", ha="center")
    ax = axes[2]
    rp = diagnostics.radial
    ax.fill_between(rp.rho, rp.min_sd, rp.max_sd, color=BAND, label="range over angle")
    ax.plot(rp.rho, rp.rms_sd, color=LINE, label="rms over angle")
    ax.set_xlabel("relative radius r/b (bore to outer rim)")
    ax.set_ylabel(axis_label("posterior sd", unit, VALUE))
    ax.set_title("posterior sd across the wall", fontsize=10)
    ax.legend(fontsize=7)
