"""Make the annulus demo data set (SYNTHETIC: an invented scenario, not a measurement).

Scenario: a section of insulated steam line, held steady. The wall is the mineral-wool
insulation (conductivity about 0.05 W/m/K) between the steel pipe's surface, radius 50 mm, and
the aluminium cladding, radius 100 mm. Steam at about 180 degC; condensate collects along the
bottom of the pipe (270 deg), so the pipe surface is a few degrees cooler there. Rain has soaked
the underside of the cladding, so the outer surface is cooler near 270 deg and warmest on top.
24 thermocouples sit on the cladding at equal spacing; a failed harness silences 6 neighbouring
channels (105-180 deg), one more channel dropped out. 8 thermocouples on the pipe surface (one
failed) and 3 probes pushed into the insulation. Readings are the true harmonic field plus
Gaussian noise of sd 0.3 degC. Units: metres and degC.

Writes datasets/annulus_readings.csv, annulus_query.csv and the truth files
annulus_truth_query.csv, annulus_truth_boundary.csv (rim, theta_deg, true_value) and
annulus_truth_heat_flow.csv (net heat flow per metre at the conductivity 0.05 W/m/K).
Run:  python datasets/make_annulus_demo.py
"""

from pathlib import Path

import numpy as np
import pandas as pd

from invert.geometry import Annulus

HERE = Path(__file__).parent
INNER, OUTER = 0.05, 0.10
CONDUCTIVITY = 0.05
SIGMA = 0.3
HEADER = ("# SYNTHETIC annulus demo data made by datasets/make_annulus_demo.py (invented "
          "scenario, not a measurement). Units: m, degC.\n")


def _bump(theta, centre_deg, width):
    d = np.angle(np.exp(1j * (theta - np.deg2rad(centre_deg))))
    return np.exp(-0.5 * (d / width) ** 2)


def true_outer(theta):
    """Cladding (degC): warm on top, the rain-soaked underside cooler."""
    return 42.0 + 3.0 * np.sin(theta) - 6.0 * _bump(theta, 270.0, 0.5)


def true_inner(theta):
    """Pipe surface (degC): steam at 180 degC, condensate cooling the bottom a little."""
    return 180.0 - 4.0 * _bump(theta, 270.0, 0.5)


def rim_series(values, n_modes):
    """Fourier coefficients ``(a0, a1, b1, ..., aN, bN)`` of equally spaced rim samples."""
    c = np.fft.rfft(values) / len(values)
    out = np.empty(2 * n_modes + 1)
    out[0] = c[0].real
    out[1::2] = 2 * c[1:n_modes + 1].real
    out[2::2] = -2 * c[1:n_modes + 1].imag
    return out


def main():
    """Write the demo readings, query points and truth files into datasets/."""
    rng = np.random.default_rng(20261203)
    truth = Annulus(OUTER, INNER, n_modes=96)
    th = np.arange(4096) * 2 * np.pi / 4096
    coef = np.zeros(truth.n_coef)
    coef[truth.rim_column_mask(0)] = rim_series(true_outer(th), truth.n_modes)
    coef[truth.rim_column_mask(1)] = rim_series(true_inner(th), truth.n_modes)

    n_out, n_in = 24, 8
    t_out = np.arange(n_out) * 2 * np.pi / n_out
    t_in = (np.arange(n_in) + 0.5) * 2 * np.pi / n_in
    probes = truth.from_polar([0.6, 0.75, 0.9], np.deg2rad([30.0, 250.0, 160.0]))
    pts = np.vstack([truth.from_polar(1.0, t_out), truth.from_polar(INNER / OUTER, t_in),
                     probes])
    ids = ([f"OS{i + 1:02d}" for i in range(n_out)] + [f"B{i + 1}" for i in range(n_in)]
           + ["W1", "W2", "W3"])
    value = truth.field(coef, pts) + SIGMA * rng.standard_normal(len(pts))
    gap = np.zeros(len(pts), bool)
    gap[7:13] = True  # failed harness: OS08..OS13 (105-180 deg)
    gap[rng.choice(np.flatnonzero(~gap[:n_out]), 1)] = True
    gap[n_out + 2] = True  # pipe-surface thermocouple B3 failed
    value = np.where(gap, np.nan, value)
    readings = pd.DataFrame({"sensor": ids, "x": pts[:, 0].round(7), "y": pts[:, 1].round(7),
                             "value": value.round(3), "sigma": SIGMA})

    qpts = truth.from_polar([0.75, 0.75, 0.75, 0.95],
                            np.deg2rad([90.0, 270.0, 140.0, 140.0]))
    query = pd.DataFrame({"label": ["mid_wall_top", "mid_wall_bottom", "mid_wall_harness_gap",
                                    "near_surface_harness_gap"],
                          "x": qpts[:, 0].round(7), "y": qpts[:, 1].round(7)})
    tq = truth.field(coef, query[["x", "y"]].to_numpy())
    rim_pts, cols = truth.rim_grid(360)
    tb = truth.field(coef, rim_pts)
    flow = float(truth.heat_flow_row(CONDUCTIVITY) @ coef)

    for name, frame in (("annulus_readings.csv", readings), ("annulus_query.csv", query),
                        ("annulus_truth_query.csv", query.assign(true_value=tq.round(4))),
                        ("annulus_truth_boundary.csv",
                         pd.DataFrame({"rim": cols["rim"], "theta_deg": cols["theta_deg"],
                                       "true_value": tb.round(4)})),
                        ("annulus_truth_heat_flow.csv",
                         pd.DataFrame({"conductivity_W_per_m_K": [CONDUCTIVITY],
                                       "heat_flow_W_per_m": [round(flow, 3)]}))):
        with open(HERE / name, "w") as fh:
            fh.write(HEADER)
            frame.to_csv(fh, index=False)


if __name__ == "__main__":
    main()
