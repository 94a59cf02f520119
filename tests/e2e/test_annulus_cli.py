"""The command line on an annulus (``--domain annulus``): outputs, heat flow and bad input.

The scenario (synthetic, invented here): a steel steam line, bore 50 mm, outside 80 mm, 180 C
inside and 60 C outside with a cosine variation on the outer surface, 24 thermocouples on the
outer surface, 12 on the bore and 3 drilled into the wall; 3 failed. Outside references: the
steady radial conduction through a cylindrical wall (Bergman, Lavine, Incropera & DeWitt,
Fundamentals of Heat and Mass Transfer, 7th ed., section 3.3.1) for the heat flow, and the
the rim functions of the true field for its coefficients.
"""

import json

import numpy as np
import pandas as pd
import pytest

from invert.cli import main
from invert.geometry import Annulus

A, B, K = 0.05, 0.08, 16.0
TI, TO = 180.0, 60.0


def truth(d):
    """Coefficients of the true field: radial conduction plus a cos(theta) on the outer rim."""
    c = np.zeros(d.n_coef)
    names = d.coefficient_names
    c[names.index("o_a0")], c[names.index("i_a0")] = TO, TI
    c[names.index("o_a1")] = 4.0
    return c


@pytest.fixture(scope="module")
def readings(tmp_path_factory):
    rng = np.random.default_rng(11)
    d = Annulus(B, A, n_modes=4)
    th_o = 2 * np.pi * np.arange(24) / 24
    th_i = 2 * np.pi * (np.arange(12) + 0.5) / 12
    pts = np.vstack([d.from_polar(1.0, th_o), d.from_polar(A / B, th_i),
                     d.from_polar([0.7, 0.8, 0.9], [0.3, 2.4, 4.4])])
    v = d.field(truth(d), pts) + 0.1 * rng.standard_normal(len(pts))
    v[[5, 6, 30]] = np.nan
    df = pd.DataFrame({"sensor": [f"t{k}" for k in range(len(pts))], "x": pts[:, 0],
                       "y": pts[:, 1], "value": v, "sigma": 0.1})
    path = tmp_path_factory.mktemp("ann") / "wall.csv"
    df.to_csv(path, index=False)
    return path


def run(args, capsys):
    try:
        code = main([str(a) for a in args])
    except SystemExit as exc:  # argparse's own checks (option types) exit from the parser
        code = exc.code
    out = capsys.readouterr()
    return code, out.out, out.err


def fit_args(path, out, *extra):
    return ["fit", path, "--domain", "annulus", "--radius", B, "--inner-radius", A,
            "--out", out, *extra]


@pytest.mark.parametrize("method", ["tikhonov", "gaussian"])
def test_fit_annulus_writes_every_file_and_the_heat_flow(readings, tmp_path, capsys, method):
    out = tmp_path / "o"
    code, _, err = run(fit_args(readings, out, "--conductivity", K, "--method", method), capsys)
    assert code == 0, err
    for name in ("summary.json", "boundary.csv", "field.csv", "rim_flux.csv", "report.html",
                 "rim_profiles.png", "wall_maps.png", "rim_flux.png"):
        assert (out / name).exists(), name
    b = pd.read_csv(out / "boundary.csv")
    assert list(b.columns) == ["rim", "theta_deg", "mean", "sd", "lower", "upper"]
    assert b["rim"].tolist() == ["outer"] * 360 + ["inner"] * 360
    f = pd.read_csv(out / "field.csv")
    r = np.hypot(f["x"], f["y"])  # CSV keeps 10 significant digits: 1e-9 relative
    assert r.min() >= A * (1 - 1e-9) and r.max() <= B * (1 + 1e-9)
    s = json.loads((out / "summary.json").read_text())
    assert s["domain"]["domain"] == "annulus" and s["domain"]["inner_radius"] == A
    hf = s["heat_flow"]
    assert hf["unit"] == "W/m" and hf["conductivity"] == K
    # Textbook heat flow per unit length (Bergman et al. 3.3.1); the cos(theta) term carries
    # no net flow. It must lie in the 90 % interval.
    Q = 2 * np.pi * K * (TI - TO) / np.log(B / A)
    assert hf["lower"] <= Q <= hf["upper"]
    assert hf["lower"] < hf["mean"] < hf["upper"] and hf["sd"] > 0
    html = (out / "report.html").read_text(encoding="utf-8")
    assert "Net heat flow through the wall" in html and "mid-wall" in html


def test_fit_annulus_without_conductivity_reports_per_unit_conductivity(readings, tmp_path,
                                                                        capsys):
    out = tmp_path / "o"
    code, _, err = run(fit_args(readings, out), capsys)
    assert code == 0, err
    hf = json.loads((out / "summary.json").read_text())["heat_flow"]
    assert hf["unit"] == "per unit conductivity" and hf["conductivity"] is None
    Q1 = 2 * np.pi * (TI - TO) / np.log(B / A)
    assert hf["lower"] <= Q1 <= hf["upper"]


def test_fit_annulus_accepts_polar_readings(readings, tmp_path, capsys):
    # r,theta_deg columns instead of x,y: the same fit (the reader converts them; rounding of
    # the written CSV, 1e-9 of the values).
    df = pd.read_csv(readings)
    pol = pd.DataFrame({"sensor": df["sensor"], "r": np.hypot(df["x"], df["y"]),
                        "theta_deg": np.rad2deg(np.arctan2(df["y"], df["x"])),
                        "value": df["value"], "sigma": df["sigma"]})
    path = tmp_path / "polar.csv"
    pol.to_csv(path, index=False)
    assert run(fit_args(readings, tmp_path / "a"), capsys)[0] == 0
    assert run(fit_args(path, tmp_path / "b"), capsys)[0] == 0
    a, b = (pd.read_csv(tmp_path / n / "boundary.csv") for n in "ab")
    np.testing.assert_allclose(a["mean"], b["mean"], rtol=0, atol=1e-9 * TI)


@pytest.mark.parametrize("extra, message", [
    ([], "--domain annulus needs --inner-radius"),
    (["--inner-radius", "0.08"], "--inner-radius must be below --radius 0.08"),
    (["--inner-radius", "0.1"], "--inner-radius must be below --radius 0.08"),
    (["--inner-radius", "-0.01"], "--inner-radius must be > 0"),
])
def test_bad_inner_radius_is_one_line(readings, tmp_path, capsys, extra, message):
    out = tmp_path / "o"
    code, _, err = run(["fit", readings, "--domain", "annulus", "--radius", B, "--out", out,
                        *extra], capsys)
    assert code == 2 and message in err
    # one error line (an option-type error from the parser comes after its usage lines)
    assert err.strip().splitlines()[-1].startswith("rim-invert: error: ")
    assert sum(line.startswith("rim-invert: error") for line in err.splitlines()) == 1
    assert not out.exists()


def test_inner_radius_and_conductivity_refused_for_a_disk(readings, tmp_path, capsys):
    code, _, err = run(["fit", readings, "--radius", B, "--inner-radius", A, "--out",
                        tmp_path / "o"], capsys)
    assert code == 2 and "--inner-radius does not apply to --domain disk" in err
    code, _, err = run(["fit", readings, "--radius", B, "--conductivity", K, "--out",
                        tmp_path / "o"], capsys)
    assert code == 2 and "--conductivity needs a region with a bore" in err
    assert not (tmp_path / "o").exists()


@pytest.mark.parametrize("where, message", [
    ((0.02, 0.0), "row 3: point (x, y) = (0.02, 0) lies inside the bore: r = 0.02 < inner "
                  "radius 0.05"),
    ((0.0, 0.09), "row 3: point (x, y) = (0, 0.09) lies outside the wall: r = 0.09 > outer "
                  "radius 0.08"),
])
def test_point_in_the_bore_or_outside_names_its_row(readings, tmp_path, capsys, where,
                                                    message):
    df = pd.read_csv(readings)
    df.loc[1, ["x", "y"]] = where
    path = tmp_path / "bad.csv"
    df.to_csv(path, index=False)
    out = tmp_path / "o"
    code, _, err = run(fit_args(path, out), capsys)
    assert code == 2 and f"bad.csv, {message}" in err
    assert len(err.strip().splitlines()) == 1 and not out.exists()


@pytest.mark.slow
def test_fit_annulus_mcmc_runs(readings, tmp_path, capsys):
    # Smoke test: the sampled stage sees only the linear problem.
    out = tmp_path / "o"
    code, _, err = run(fit_args(readings, out, "--method", "mcmc", "--max-steps", "3000"),
                       capsys)
    assert code == 0, err
    assert (out / "posterior.nc").exists()
    assert "heat_flow" in json.loads((out / "summary.json").read_text())
