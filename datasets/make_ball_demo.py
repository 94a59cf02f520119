"""Make the ball demo data set (SYNTHETIC: an invented scenario, not a measurement).

Scenario: a spherical thermal-storage vessel of radius 1.2 m filled with dry sand (a solid
conductor, so the steady temperature inside is harmonic), held steady with a heater pad on the
shell near latitude 40 deg, longitude 80 deg and a cold pipe clamp near the bottom. 42 shell
thermistors sit on five latitude rings (-60, -30, 0, 30, 60 deg; 8 per ring, ring offsets
staggered) plus one at each pole. A failed cable harness silences the shell sensors between
longitude 100 and 190 deg on the rings at -30, 0 and 30 deg (a missing patch), and 2 more
channels dropped out at random. Three interior probes sit on an inspection lance. Readings are
the true harmonic field plus Gaussian noise of sd 0.1 degC (a calibrated thermistor). Units:
metres and degC; coordinates relative to the vessel centre, z up, longitude measured from +x
counter-clockwise about +z.

Writes datasets/ball_readings.csv, datasets/ball_query.csv, datasets/ball_truth_boundary.csv
(5-degree latitude/longitude grid, the grid of boundary.csv) and datasets/ball_truth_query.csv.
Run:  python datasets/make_ball_demo.py
Then: rim-invert fit datasets/ball_readings.csv --domain ball --radius 1.2 \
          --query datasets/ball_query.csv --out ball-output
"""

from pathlib import Path

import numpy as np
import pandas as pd

from invert import Ball

HERE = Path(__file__).parent
RADIUS = 1.2
SIGMA = 0.1
HEADER = ("# SYNTHETIC demo data made by datasets/make_ball_demo.py (invented scenario, not a "
          "measurement): spherical sand-filled storage vessel, radius 1.2 m. Units: m, degC.\n")


def unit_vector(lat_deg, lon_deg):
    lat, lon = np.deg2rad(lat_deg), np.deg2rad(lon_deg)
    return np.stack([np.cos(lat) * np.cos(lon), np.cos(lat) * np.sin(lon), np.sin(lat)], -1)


def true_surface(u):
    """True shell temperature (degC) at unit vectors ``u``: heater pad, cold clamp, a mild
    top-to-bottom stratification of the surroundings."""
    hot = np.arccos(np.clip(u @ unit_vector(25.0, 70.0), -1, 1))
    cold = np.arccos(np.clip(u @ unit_vector(-75.0, -120.0), -1, 1))
    return (45.0 + 18.0 * np.exp(-0.5 * (hot / 0.55) ** 2) - 8.0 * np.exp(-0.5 * (cold / 0.6) ** 2)
            + 2.5 * u[..., 2])


def main():
    rng = np.random.default_rng(20261203)
    truth = Ball(RADIUS, (0.0, 0.0, 0.0), 48)
    nodes, _ = truth.rim_quadrature(80)
    coef = truth.rim_coefficients(true_surface((nodes - truth.center) / RADIUS), 80)

    lat, lon, ids = [], [], []
    for k, ring in enumerate([-60, -30, 0, 30, 60]):
        for j in range(8):
            lat.append(ring)
            lon.append(-180.0 + 45.0 * j + 22.5 * (k % 2))
            ids.append(f"S{len(ids) + 1:02d}")
    lat += [90.0, -90.0]
    lon += [0.0, 0.0]
    ids += ["N", "S"]
    lat, lon = np.array(lat, float), np.array(lon, float)
    shell = RADIUS * unit_vector(lat, lon)
    probes = np.array([[0.15, -0.1, 0.6], [0.15, -0.1, 0.0], [0.15, -0.1, -0.6]])
    pts = np.vstack([shell, probes])
    ids += ["L1", "L2", "L3"]
    value = truth.field(coef, pts) + SIGMA * rng.standard_normal(len(pts))
    gap = np.zeros(len(pts), bool)
    lon360 = np.mod(lon, 360)
    gap[: len(shell)] = (lon360 >= 100) & (lon360 <= 190) & (np.abs(lat) <= 30)
    others = np.flatnonzero(~gap[: len(shell)])
    gap[rng.choice(others, 2, replace=False)] = True
    value = np.where(gap, np.nan, value)
    readings = pd.DataFrame({"sensor": ids, "x": pts[:, 0].round(6) + 0.0, "y": pts[:, 1].round(6) + 0.0,
                             "z": pts[:, 2].round(6) + 0.0, "value": value.round(3), "sigma": SIGMA})

    q_ll = {"under_heater_0.9R": (40.0, 80.0, 0.9), "in_gap_0.9R": (10.0, 145.0, 0.9),
            "gap_shell": (10.0, 145.0, 1.0), "near_clamp_0.8R": (-75.0, -120.0, 0.8)}
    qpts = [[0.0, 0.0, 0.0]] + [list(r * RADIUS * unit_vector(a, b)) for a, b, r in q_ll.values()]
    query = pd.DataFrame(np.round(qpts, 6) + 0.0, columns=["x", "y", "z"])
    query.insert(0, "label", ["centre", *q_ll])
    tq = truth.field(coef, query[["x", "y", "z"]].to_numpy())

    grid, cols = Ball(RADIUS).rim_grid(360)
    tb = pd.DataFrame({**cols, "true_value": truth.field(coef, grid).round(4)})

    for name, frame in [("ball_readings.csv", readings), ("ball_query.csv", query),
                        ("ball_truth_boundary.csv", tb),
                        ("ball_truth_query.csv", query.assign(true_value=tq.round(4)))]:
        with open(HERE / name, "w") as fh:
            fh.write(HEADER)
            frame.to_csv(fh, index=False)
    print(f"{int((~gap).sum())} readings, {int(gap.sum())} gaps; centre true value "
          f"{tq[0]:.3f} degC (surface mean {coef[0]:.3f})")


if __name__ == "__main__":
    main()
