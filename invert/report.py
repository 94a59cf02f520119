"""Figures of a fit. matplotlib is imported inside the functions that draw."""

from __future__ import annotations

from pathlib import Path

import numpy as np

__all__ = ["write_figures", "plot_rim_profile", "plot_field_maps"]


def _mpl():
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    return plt


def _gap_arcs(domain, gap_points):
    """Angles (degrees) of gap sensors on the rim."""
    if gap_points is None or len(gap_points) == 0:
        return np.array([])
    rho, th = domain.to_polar(gap_points)
    return np.rad2deg(np.mod(th[rho > 0.999], 2 * np.pi))


def plot_rim_profile(ax, estimate, problem, level=0.9, unit=""):
    """Rim profile: mean, central band at ``level``, rim readings, gap sensors shaded."""
    domain = estimate.domain
    b = estimate.boundary(720, level)
    t = b["theta_deg"].to_numpy()
    ax.fill_between(t, b["lower"], b["upper"], color="#9ecae1", alpha=0.7,
                    label=f"{int(round(level * 100))} % interval")
    ax.plot(t, b["mean"], color="#08519c", lw=1.5, label="estimate")
    gaps = _gap_arcs(domain, problem.gap_points)
    spacing = 360.0 / max(problem.n_readings + len(problem.gap_sensor), 8)
    for k, g in enumerate(gaps):
        ax.axvspan(g - spacing / 2, g + spacing / 2, color="#fdd0a2", alpha=0.6, lw=0,
                   label="sensor without reading" if k == 0 else None)
    rho, th = domain.to_polar(problem.points)
    rim = rho > 0.999
    err = problem.sigma[rim] if problem.sigma is not None else None
    ax.errorbar(np.rad2deg(np.mod(th[rim], 2 * np.pi)), problem.y[rim], yerr=err, fmt="o",
                ms=4, color="#252525", label="rim readings")
    ax.set_xlim(0, 360)
    ax.set_xticks(range(0, 361, 45))
    ax.set_xlabel("rim angle θ (degrees, counter-clockwise from +x)")
    ax.set_ylabel(f"value {unit}".strip())
    ax.legend(loc="best", fontsize=8)


def plot_field_maps(fig, estimate, problem, level=0.9, n=121, unit=""):
    """Interior mean (with flux lines from the harmonic conjugate) and posterior sd maps."""
    domain = estimate.domain
    xs, ys, pts, inside = domain.interior_grid(n)
    s = estimate.at(pts[inside], level)
    mean = np.full(len(pts), np.nan)
    sd = np.full(len(pts), np.nan)
    mean[inside], sd[inside] = s.mean, s.sd
    stream = np.full(len(pts), np.nan)
    stream[inside] = domain.conjugate(estimate.mean, pts[inside])
    axes = fig.subplots(1, 2)
    for ax, data, title, cmap in ((axes[0], mean, "estimated field", "inferno"),
                                  (axes[1], sd, "posterior sd", "viridis")):
        im = ax.pcolormesh(xs, ys, data.reshape(n, n), cmap=cmap, shading="auto")
        fig.colorbar(im, ax=ax, shrink=0.8, label=f"{title} {unit}".strip())
        th = np.linspace(0, 2 * np.pi, 400)
        ax.plot(domain.center[0] + domain.radius * np.cos(th),
                domain.center[1] + domain.radius * np.sin(th), color="k", lw=0.8)
        ax.plot(problem.points[:, 0], problem.points[:, 1], "o", ms=4, mfc="w", mec="k",
                label="reading")
        if problem.gap_points is not None and len(problem.gap_points):
            ax.plot(problem.gap_points[:, 0], problem.gap_points[:, 1], "x", ms=6,
                    color="#d94801", label="no reading")
        ax.set_aspect("equal")
        ax.set_title(title)
        ax.set_xlabel("x")
        ax.set_ylabel("y")
    axes[0].contour(xs, ys, stream.reshape(n, n), levels=14, colors="w", linewidths=0.5,
                    alpha=0.7)
    axes[1].legend(loc="lower right", fontsize=7)


def write_figures(out_dir, estimate, problem, readings, level=0.9, unit=""):
    """Write rim_profile.png and field_maps.png into ``out_dir``; return their paths."""
    plt = _mpl()
    out = Path(out_dir)
    fig, ax = plt.subplots(figsize=(8, 3.6), layout="constrained")
    plot_rim_profile(ax, estimate, problem, level, unit)
    ax.set_title("rim profile")
    fig.savefig(out / "rim_profile.png", dpi=110)
    plt.close(fig)
    fig = plt.figure(figsize=(10, 4.2), layout="constrained")
    plot_field_maps(fig, estimate, problem, level, unit=unit)
    fig.savefig(out / "field_maps.png", dpi=110)
    plt.close(fig)
    return [out / "rim_profile.png", out / "field_maps.png"]
