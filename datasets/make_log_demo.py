"""Make the small SYNTHETIC log demo: datasets/demo_log.csv and datasets/demo_layout.csv.

An invented scenario (SYNTHETIC): a circular plate of radius 0.25 m with 16 rim thermocouples
and 2 interior probes, logged every 10 s for 100 minutes. The rim temperature drifts slowly
(each harmonic follows an Ornstein-Uhlenbeck process whose stationary law is the smoothness
prior, time scale 30 min) about 80 °C. Channels drop out for a few minutes at a time, the logger
loses 5 minutes of records (a gap in time), and a few records are damaged on purpose: one
duplicated time stamp, one text cell, one record with no readings, one unparseable time.

Run: ``python datasets/make_log_demo.py`` (seeded, so the files are reproducible).
"""

from __future__ import annotations

from pathlib import Path

import numpy as np

from invert.prior import SmoothnessPrior
from invert.workflow import make_domain

HERE = Path(__file__).resolve().parent


def simulate(n_frames=600, dt=10.0, time_scale=1800.0, noise_sd=0.05, tau=0.5, rng=0):
    """Times, true coefficients and readings of the scenario (arrays, before damage)."""
    rng = np.random.default_rng(rng)
    dom = make_domain(0.25, n_modes=8)
    th = np.linspace(0, 2 * np.pi, 16, endpoint=False)
    pts = np.vstack([0.25 * np.c_[np.cos(th), np.sin(th)], [[0.05, 0.0], [-0.08, 0.06]]])
    v = tau**2 * SmoothnessPrior(s=2.0).shape(dom.eigenvalues, dom.degrees)
    v[0] = tau**2
    t = np.arange(n_frames) * dt
    t[n_frames // 2:] += 300.0  # 5 minutes lost by the logger
    c = np.zeros((n_frames, dom.n_coef))
    c[0] = np.sqrt(v) * rng.standard_normal(dom.n_coef)
    c[0, 0] = 80.0
    for k in range(1, n_frames):
        h = t[k] - t[k - 1]
        f = np.exp(-h / time_scale)
        step = np.sqrt(v * (1 - f**2)) * rng.standard_normal(dom.n_coef)
        c[k] = f * c[k - 1] + step
        c[k, 0] = c[k - 1, 0] + np.sqrt(2 * tau**2 * h / time_scale) * rng.standard_normal()
    G = dom.design(pts)
    Y = c @ G.T + noise_sd * rng.standard_normal((n_frames, len(pts)))
    for _ in range(8):  # drop-out episodes of 1-6 minutes
        j = rng.integers(len(pts))
        a = rng.integers(n_frames)
        Y[a:a + rng.integers(6, 36), j] = np.nan
    return dom, pts, t, c, Y


def main():
    dom, pts, t, c, Y = simulate()
    names = [f"tc{i:02d}" for i in range(16)] + ["probe1", "probe2"]
    with open(HERE / "demo_layout.csv", "w") as fh:
        fh.write("# SYNTHETIC layout for demo_log.csv (invented scenario; make_log_demo.py)\n")
        fh.write("sensor,x,y\n")
        for n, (x, y) in zip(names, pts, strict=True):
            fh.write(f"{n},{x:.6f},{y:.6f}\n")
    rows = []
    for k in range(len(t)):
        cells = ["" if not np.isfinite(v) else f"{v:.4f}" for v in Y[k]]
        rows.append([f"{t[k]:.1f}"] + cells)
    rows[100][3] = "open"            # a text cell
    rows[200] = [rows[200][0]] + [""] * len(names)   # a record with no readings
    rows[300][0] = "12:00?"          # an unparseable time
    rows.insert(401, list(rows[400]))  # a duplicated record (same time)
    with open(HERE / "demo_log.csv", "w") as fh:
        fh.write("# SYNTHETIC log (invented scenario; see datasets/make_log_demo.py)\n")
        fh.write(",".join(["time"] + names) + "\n")
        for r in rows:
            fh.write(",".join(r) + "\n")


if __name__ == "__main__":
    main()
