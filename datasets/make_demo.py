"""Make the bundled demo data set (SYNTHETIC: an invented scenario, not a measurement).

Scenario: a circular steel plate of radius 0.25 m, held steady with a heated clamp near 45 deg
on its rim. 32 rim thermocouples at equal spacing; a failed harness silences 5 neighbouring
channels (about 157-270 deg), 3 more channels dropped out at random; 4 interior probes. Readings
are the true harmonic field plus Gaussian noise of sd 0.4 degC (in the spirit of a class-1
thermocouple after calibration). Units: metres and degC.

Writes datasets/demo_*.csv and the same files into invert/data/ (shipped with the package).
Run:  python datasets/make_demo.py
"""

from pathlib import Path

import numpy as np
import pandas as pd

from invert import Disk

HERE = Path(__file__).parent
PACKAGE = HERE.parent / "invert" / "data"
RADIUS = 0.25
SIGMA = 0.4
HEADER = ("# SYNTHETIC demo data made by datasets/make_demo.py (invented scenario, not a "
          "measurement). Units: m, degC.\n")


def true_rim(theta):
    """True rim temperature (degC): a hot clamp near 45 deg and a mild two-fold variation."""
    d = np.angle(np.exp(1j * (theta - np.deg2rad(45))))
    return 72.0 + 24.0 * np.exp(-0.5 * (d / 0.45) ** 2) + 5.0 * np.cos(2 * theta + 0.6)


def main():
    rng = np.random.default_rng(20261202)
    truth = Disk(RADIUS, (0, 0), 96)
    coef = truth.rim_coefficients(true_rim(np.arange(4096) * 2 * np.pi / 4096))

    n_rim = 32
    th = np.arange(n_rim) * 2 * np.pi / n_rim
    rim = truth.from_polar(1.0, th)
    sensors = [f"T{i + 1:02d}" for i in range(n_rim)]
    probes = truth.from_polar([0.0, 0.45, 0.6, 0.75], np.deg2rad([0, 200, 70, 300]))
    pts = np.vstack([rim, probes])
    ids = sensors + ["P1", "P2", "P3", "P4"]
    value = truth.field(coef, pts) + SIGMA * rng.standard_normal(len(pts))
    gap = np.zeros(len(pts), bool)
    gap[14:19] = True  # failed harness: T15..T19
    others = np.flatnonzero(~gap[:n_rim])
    gap[rng.choice(others, 3, replace=False)] = True
    value = np.where(gap, np.nan, value)
    readings = pd.DataFrame({"sensor": ids, "x": pts[:, 0].round(6), "y": pts[:, 1].round(6),
                             "value": value.round(3), "sigma": SIGMA})

    query = pd.DataFrame({
        "label": ["centre", "hot_side", "cold_side", "gap_edge", "near_gap_rim"],
        "x": [0.0, 0.1, -0.1, -0.15, -0.2],
        "y": [0.0, 0.1, -0.05, 0.05, -0.14],
    })
    tq = truth.field(coef, query[["x", "y"]].to_numpy())
    theta_deg = np.arange(360.0)
    tb = truth.field(coef, truth.from_polar(1.0, np.deg2rad(theta_deg)))

    for folder in (HERE, PACKAGE):
        folder.mkdir(parents=True, exist_ok=True)
        for name, frame in (("demo_readings.csv", readings), ("demo_query.csv", query)):
            with open(folder / name, "w") as fh:
                fh.write(HEADER)
                frame.to_csv(fh, index=False)
    with open(HERE / "demo_truth_query.csv", "w") as fh:
        fh.write(HEADER)
        query.assign(true_value=tq.round(4)).to_csv(fh, index=False)
    with open(HERE / "demo_truth_boundary.csv", "w") as fh:
        fh.write(HEADER)
        pd.DataFrame({"theta_deg": theta_deg, "true_value": tb.round(4)}).to_csv(fh, index=False)


if __name__ == "__main__":
    main()
