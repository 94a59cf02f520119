"""Figures of a fit on a ball: a latitude/longitude map of the surface and interior slices.

matplotlib is imported inside the functions that draw. :func:`write_figures_ball` is registered
for :class:`~invert.geometry.ball.Ball` (through a captioning adapter) in
:data:`invert.report.figures.FIGURES`.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np

from .plots import LENGTH, VALUE, axis_label, mpl_pyplot, save_figure

__all__ = ["write_figures_ball", "plot_surface_map", "plot_slices", "SLICE_PLANES"]

#: The central planes drawn, by their normal axis: the three planes of field.csv.
SLICE_PLANES = ("z", "y", "x")


def _latlon(domain, points):
    """Latitude and longitude in degrees of points (projected radially onto the sphere)."""
    _, polar, azimuth = domain.to_spherical(points)
    return 90.0 - np.rad2deg(polar), np.rad2deg(azimuth)


def _surface_split(domain, points, tol=1e-3):
    """Mask of points on the sphere (within the rim tolerance)."""
    if points is None or len(points) == 0:
        return np.zeros(0, bool)
    rho, _, _ = domain.to_spherical(points)
    return rho >= 1 - tol


def plot_surface_map(fig, estimate, problem, level=0.9, n=480, unit=""):
    """Mean and posterior sd on the sphere as latitude/longitude maps, sensors marked.

    Parameters
    ----------
    fig : matplotlib Figure
    estimate, problem
        The fit.
    level : float, default=0.9
    n : int, default=480
        Rim-grid size passed to ``domain.rim_grid`` (480 gives a 3.75-degree grid).
    unit : str
        Unit of the values, for the colour bars.
    """
    domain = estimate.domain
    pts, cols = domain.rim_grid(n)
    lat = np.unique(cols["lat_deg"])
    lon = np.unique(cols["lon_deg"])
    s = estimate.at(pts, level)
    shape = (lat.size, lon.size)
    axes = fig.subplots(1, 2, sharey=True)
    on = _surface_split(domain, problem.points)
    slat, slon = _latlon(domain, problem.points[on]) if on.any() else (np.array([]),) * 2
    gaps = problem.gap_points
    gon = _surface_split(domain, gaps)
    glat, glon = _latlon(domain, gaps[gon]) if gon.any() else (np.array([]),) * 2
    for ax, data, title, cmap in ((axes[0], s.mean, "estimated surface value", "inferno"),
                                  (axes[1], s.sd, "posterior sd", "viridis")):
        im = ax.pcolormesh(lon, lat, data.reshape(shape), cmap=cmap, shading="nearest")
        fig.colorbar(im, ax=ax, shrink=0.85, label=axis_label(title, unit, VALUE))
        ax.plot(slon, slat, "o", ms=4, mfc="w", mec="k", label="surface reading")
        if glat.size:
            ax.plot(glon, glat, "x", ms=7, mew=1.5, color="#d94801", label="no reading")
        ax.set_xlim(-180, 180)
        ax.set_ylim(-90, 90)
        ax.set_xticks(range(-180, 181, 60))
        ax.set_yticks(range(-90, 91, 30))
        ax.set_xlabel("longitude (degrees from +x about +z)")
        ax.set_title(title)
    axes[0].set_ylabel("latitude (degrees)")
    axes[1].legend(loc="lower right", fontsize=7)


def plot_slices(fig, estimate, problem, level=0.9, n=81, unit="", axes_normal=SLICE_PLANES,
                near=0.1, length_unit=""):
    """Mean (top row) and posterior sd (bottom row) on central planes through the ball.

    One column per plane of ``axes_normal`` (by default the three planes of field.csv), one
    colour scale per row so that the planes can be compared. Readings within ``near * R`` of
    a plane are marked on it (interior probes as triangles, surface sensors as circles).
    """
    from matplotlib.colors import Normalize

    domain = estimate.domain
    names = {"z": ("x", "y"), "y": ("x", "z"), "x": ("y", "z")}
    index = {"x": 0, "y": 1, "z": 2}
    c = np.asarray(domain.center)
    on = _surface_split(domain, problem.points)
    circle = np.linspace(0, 2 * np.pi, 400)
    planes = []
    for axis in axes_normal:
        us, vs, pts, inside = domain.slice_grid(n, axis)
        s = estimate.at(pts[inside], level)
        mean, sd = np.full(len(pts), np.nan), np.full(len(pts), np.nan)
        mean[inside], sd[inside] = s.mean, s.sd
        planes.append((axis, us, vs, mean.reshape(n, n), sd.reshape(n, n)))
    grid = fig.subplots(2, len(planes), squeeze=False)
    rows = (("estimated field", "inferno", 3), ("posterior sd", "viridis", 4))
    for r, (title, cmap, k_data) in enumerate(rows):
        norm = Normalize(np.nanmin([np.nanmin(p[k_data]) for p in planes]),
                         np.nanmax([np.nanmax(p[k_data]) for p in planes]))
        for ax, plane in zip(grid[r], planes):
            axis, us, vs = plane[:3]
            k = index[axis]
            iu, iv = (index[a] for a in names[axis])
            im = ax.pcolormesh(us, vs, plane[k_data], cmap=cmap, norm=norm, shading="auto")
            ax.plot(c[iu] + domain.radius * np.cos(circle),
                    c[iv] + domain.radius * np.sin(circle), color="k", lw=0.8)
            close = np.abs(problem.points[:, k] - c[k]) <= near * domain.radius
            ax.plot(problem.points[close & on, iu], problem.points[close & on, iv], "o", ms=4,
                    mfc="w", mec="k", label="surface reading near plane")
            ax.plot(problem.points[close & ~on, iu], problem.points[close & ~on, iv], "^",
                    ms=6, mfc="w", mec="k", label="interior probe near plane")
            ax.set_aspect("equal")
            ax.set_xlabel(axis_label(names[axis][0], length_unit, LENGTH))
            ax.set_ylabel(axis_label(names[axis][1], length_unit, LENGTH))
            ax.set_title(f"{title}, plane {axis} = {c[k]:g}", fontsize=10)
        fig.colorbar(im, ax=list(grid[r]), shrink=0.85, label=axis_label(title, unit, VALUE))
    grid[1, -1].legend(loc="upper center", bbox_to_anchor=(0.5, -0.22), fontsize=7, ncol=2)


def write_figures_ball(out_dir, estimate, problem, readings=None, level=0.9, unit="",
                       length_unit=""):
    """Write ``surface_map.png`` and ``interior_slices.png`` into ``out_dir``.

    Parameters
    ----------
    out_dir : str or Path
    estimate : Estimate
        A fit on a :class:`~invert.geometry.ball.Ball`.
    problem : LinearProblem
    readings : Readings, optional
        Not needed for the drawings (kept for the same call shape as the disk figures).
    level : float, default=0.9
    unit, length_unit : str, default=""
        Units of the values and of the coordinates.

    Returns
    -------
    list of Path
    """
    plt = mpl_pyplot()
    out = Path(out_dir)
    fig = plt.figure(figsize=(12, 4.2), layout="constrained")
    plot_surface_map(fig, estimate, problem, level, unit=unit)
    fig.suptitle("surface of the ball (latitude/longitude map)")
    save_figure(plt, fig, out / "surface_map.png")
    fig = plt.figure(figsize=(14, 8.2), layout="constrained")
    plot_slices(fig, estimate, problem, level, unit=unit, length_unit=length_unit)
    fig.suptitle("central slices through the ball (the three planes of field.csv)")
    save_figure(plt, fig, out / "interior_slices.png")
    return [out / "surface_map.png", out / "interior_slices.png"]
