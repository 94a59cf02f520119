"""Figures and report as a reader sees them: user strings literal, cautions on top, the
exceedance map showing its contours, three ball planes, legends off the bars, long traces, long
sensor ids shortened, no stray runtime warnings, and a one-line error that is never empty.

Oracles: the HTML text rule (``html.escape``), matplotlib's own layout (window extents after a
draw), scipy's normal tail ``norm.sf`` for exceedance probabilities, and for residual degrees
of freedom the closed form of an interpolating fit (hat matrix = identity when the design has
more columns than rows and λ → 0, so m − tr(H) = 0).
"""

import html
import json
import subprocess
import sys
import warnings
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from scipy.stats import norm

from invert import Disk, FitWarning, LinearProblem, Readings
from invert.cli import main, run_fit
from invert.cli_checks import one_line
from invert.report.disk_figures import EXCEEDANCE_LEVELS, exceedance_levels
from invert.report.html import write_report
from invert.report.plots import mpl_pyplot, plot_residuals, shorten, visible
from invert.stages import Tikhonov

DATA = Path(__file__).resolve().parents[2] / "invert" / "data"
ROOT = Path(__file__).resolve().parents[2]
PNGS = {"rim_profile.png", "field_maps.png", "exceedance.png", "depth.png",
        "gap_dependence.png", "residuals.png"}


def _cli(*args):
    return subprocess.run([sys.executable, "-m", "invert.cli", *map(str, args)],
                          capture_output=True, text=True, cwd=ROOT)


# --- user strings ------------------------------------------------------------------------------
@pytest.mark.parametrize("unit", ["$^$", "<b>x</b>", "a\\b $\\alpha$"])
def test_units_with_mathtext_and_html_are_shown_literally(tmp_path, unit):
    query = tmp_path / "q.csv"
    label = "probe \\n $x^$ <i>"
    pd.DataFrame({"x": [0.05], "y": [0.02], "label": [label]}).to_csv(query, index=False)
    out = tmp_path / "out"
    r = _cli("fit", DATA / "demo_readings.csv", "--radius", "0.25", "--out", out,
             "--query", query, "--unit", unit, "--length-unit", unit, "--threshold", "90")
    assert r.returncode == 0, r.stderr
    assert "Warning" not in r.stderr and "error" not in r.stderr
    assert PNGS <= {p.name for p in out.glob("*.png")}
    doc = (out / "report.html").read_text(encoding="utf-8")
    assert f"values in {html.escape(unit)}" in doc
    assert html.escape(label) in doc


def _small(ids, sigma=0.05, gaps=()):
    d = Disk(1.0, (0.0, 0.0), 8)
    th = 2 * np.pi * np.arange(len(ids)) / len(ids)
    pts = d.from_polar(1.0, th)
    v = 10 + pts[:, 0] + 0.05 * np.random.default_rng(3).normal(size=len(pts))
    v[list(gaps)] = np.nan
    r = Readings(pts, v, np.broadcast_to(sigma, v.shape).astype(float), np.array(ids))
    pb = LinearProblem.from_readings(r, d)
    return r, pb, Tikhonov("evidence").fit(pb)


def test_sensor_ids_with_control_characters_and_mathtext(tmp_path):
    ids = [f"s{i}" for i in range(20)]
    ids[3], ids[5], ids[7] = "T0\n3 long", "nul\x00id", "$x^$ \\alpha"
    r, pb, est = _small(ids, gaps=(3, 5))  # gaps: their ids are listed in the report
    with warnings.catch_warnings():
        warnings.simplefilter("error")  # no glyph warning, no mathtext error
        write_report(tmp_path, est, pb, r, unit="$^$", threshold=10.5)
    assert PNGS <= {p.name for p in tmp_path.glob("*.png")}
    doc = (tmp_path / "report.html").read_text(encoding="utf-8")
    # shown as escapes, then HTML-escaped; the raw control characters never reach the page
    assert "T0\\n3 long" in doc and "nul\\x00id" in doc and "\x00" not in doc
    assert visible("T0\n3") == "T0\\n3" and visible("°C µm") == "°C µm"


def test_long_sensor_ids_are_shortened_in_residuals():
    long_id = "a_very_long_sensor_identifier_from_the_logger_export_channel_07"
    assert shorten(long_id, 14) == long_id[:13] + "…" and shorten("T01") == "T01"

    class Check:
        sensor = np.array(["T01", long_id])
        std_residual = np.array([0.5, np.inf])
        loo_z = np.array([0.7, np.nan])  # a reading with a vast sigma: no finite z

    plt = mpl_pyplot()
    fig, ax = plt.subplots()
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        plot_residuals(ax, Check())
        fig.canvas.draw()
    labels = [t.get_text() for t in ax.get_xticklabels()]
    plt.close(fig)
    assert labels == ["T01", long_id[:13] + "…"]


# --- report layout -----------------------------------------------------------------------------
@pytest.fixture(scope="module")
def demo(tmp_path_factory):
    out = tmp_path_factory.mktemp("demo") / "out"
    run_fit(DATA / "demo_readings.csv", radius=0.25, out=out, query=DATA / "demo_query.csv",
            figures=True, threshold=95.0, unit="°C", length_unit="m", say=lambda s: None)
    return out


def test_cautions_come_before_the_results(demo):
    doc = (demo / "report.html").read_text(encoding="utf-8")
    assert doc.index("id='cautions'") < doc.index("<h2>Summary</h2>")
    assert doc.index("id='verdict'") < doc.index("id='cautions'")


def test_exceedance_map_draws_the_contours_its_caption_names(demo):
    # Outside oracle: with Gaussian marginals, P(u > T) = norm.sf((T - mean) / sd) on the rim
    # grid of boundary.csv (the maximum principle puts the largest values there).
    b = pd.read_csv(demo / "boundary.csv")
    p = norm.sf((95.0 - b["mean"]) / b["sd"])
    expect = [v for v in EXCEEDANCE_LEVELS if v < p.max()]
    assert expect[:2] == [0.001, 0.01]  # the demo's hot spot: small but visible risks
    assert exceedance_levels(np.append(p, 0.0)) == expect
    doc = (demo / "report.html").read_text(encoding="utf-8")
    assert "threshold 95 °C" in doc
    assert "contours at " + ", ".join(f"{v:g}" for v in expect) in doc


def test_depth_legend_lies_outside_the_bars():
    from invert.diagnostics.diagnose import diagnose
    from invert.report.disk_figures import plot_depth

    r, pb, est = _small([f"s{i}" for i in range(24)])
    plt = mpl_pyplot()
    fig = plt.figure(figsize=(15, 3.7), layout="constrained")
    plot_depth(fig, est, pb, diagnose(est, pb))
    fig.canvas.draw()
    ax = fig.axes[2]
    leg = ax.get_legend().get_window_extent()
    assert leg.y1 < ax.get_window_extent().y0  # below the axes, so above no bar
    plt.close(fig)


def test_ball_slices_show_the_three_planes_of_field_csv():
    from invert.report.ball_figures import plot_slices
    from invert.workflow import make_domain

    d = make_domain(1.0, kind="ball", s=2.0, n_modes=3)
    rng = np.random.default_rng(1)
    z = rng.normal(size=(40, 3))
    pts = z / np.linalg.norm(z, axis=1)[:, None]
    r = Readings(pts, 5 + pts[:, 0], np.full(40, 0.05), np.array([f"b{i}" for i in range(40)]))
    pb = LinearProblem.from_readings(r, d)
    est = Tikhonov("evidence").fit(pb)
    plt = mpl_pyplot()
    fig = plt.figure()
    plot_slices(fig, est, pb, n=21, unit="K")
    titles = {a.get_title() for a in fig.axes}
    plt.close(fig)
    for axis in "zyx":
        assert f"estimated field, plane {axis} = 0" in titles
        assert f"posterior sd, plane {axis} = 0" in titles
    # field.csv holds the same three planes: one coordinate zero in each row
    _, cols = est.domain.field_grid(5)
    xyz = np.column_stack([cols[c] for c in "xyz"])
    assert {tuple(np.flatnonzero(row == 0)) for row in xyz if (row == 0).sum() == 1} == \
        {(0,), (1,), (2,)}


@pytest.mark.filterwarnings("ignore::invert.errors.MCMCWarning")  # short run, few modes
def test_traces_show_more_than_the_kept_draws():
    from invert.report.plots import plot_traces
    from invert.stages import MCMCSampler

    r, pb, _ = _small([f"s{i}" for i in range(24)])
    est = MCMCSampler(s=2.0, rng=1, max_steps=400, min_steps=400, n_draws=400,
                      progress=False).fit(pb)
    kept = est.extras["posterior"]["posterior"]["tau"]
    trace = est.extras["trace"]
    assert trace["values"].shape[1] > kept.sizes["draw"]  # more than the kept draws
    # the recorded walkers are walkers of the sampler: their values lie within what it
    # visited, and the kept draws are a thinned subset of the same walkers
    assert trace["values"][..., 0].min() > 0
    plt = mpl_pyplot()
    fig = plt.figure()
    shown = plot_traces(fig, est.extras["posterior"], trace=trace)
    plt.close(fig)
    n = int(shown.split(" draws each")[0].rsplit(", ", 1)[1])
    assert n > 20


# --- runtime warnings and messages ---------------------------------------------------------
def test_huge_sigma_and_nul_byte_print_no_runtime_warning(tmp_path):
    lines = (DATA / "demo_readings.csv").read_text().splitlines()
    big = lines.copy()
    # a vast sigma the readings check still takes (above 1e100 it is refused with one line,
    # tests/e2e/test_awkward_inputs.py): no figure may warn about it
    big[4] = big[4].rsplit(",", 1)[0] + ",1e90"
    nul = lines.copy()
    nul[5] = nul[5].replace("T04", "T\x0004")
    for name, content in (("big.csv", big), ("nul.csv", nul)):
        path = tmp_path / name
        path.write_text("\n".join(content) + "\n")
        r = _cli("fit", path, "--radius", "0.25", "--out", tmp_path / name[:3],
                 "--threshold", "90")
        assert r.returncode == 0, r.stderr
        assert "RuntimeWarning" not in r.stderr and "UserWarning" not in r.stderr, r.stderr
        assert PNGS <= {p.name for p in (tmp_path / name[:3]).glob("*.png")}


def test_error_line_is_never_empty(monkeypatch, capsys):
    assert one_line(ValueError("\nfirst\nsecond")) == "first"
    assert one_line(ValueError()) == "ValueError (no message)"
    import invert.cli as cli

    def boom(args):
        raise ValueError("\n  \n")

    monkeypatch.setattr(cli, "_cmd_demo", boom)
    assert main(["demo"]) == 2
    err = capsys.readouterr().err.strip()
    assert err == "rim-invert: error: ValueError (no message)"


def test_version_flag(capsys):
    from importlib import metadata

    with pytest.raises(SystemExit) as exc:
        main(["--version"])
    assert exc.value.code == 0
    assert capsys.readouterr().out.strip() == f"rim-invert {metadata.version('rim-invert')}"


def test_demo_line_says_how_hyperparameters_were_chosen(tmp_path):
    from invert.report.files import describe_choice

    assert describe_choice({"rule": "evidence"}) == "rule evidence"
    assert describe_choice({"sampled": ["log_tau", "s"]}) == "sampled: log_tau, s"
    r = _cli("demo", "--out", tmp_path / "g", "--method", "gaussian")
    assert r.returncode == 0, r.stderr
    line = r.stdout.splitlines()[1]
    assert line.startswith("method gaussian, hyperparameters by type-II maximum likelihood")
    assert "None" not in r.stdout


# --- residual degrees of freedom ---------------------------------------------------------------
def test_nearly_interpolating_fit_warns_about_residual_dof(tmp_path):
    from invert.workflow import fit

    th = np.linspace(0, 2 * np.pi, 8, endpoint=False)
    df = pd.DataFrame({"x": np.cos(th), "y": np.sin(th), "value": 20 + np.cos(3 * th),
                       "sigma": 0.05})
    # 8 readings, 17 columns, lam -> 0: the fit interpolates, m - tr(H) = 0 (closed form)
    with pytest.warns(FitWarning, match="residual degrees of freedom are left of 8"):
        est = fit(df, radius=1.0, n_modes=8, rule="fixed", lam=1e-9)
    assert est.info["residual_dof"] == pytest.approx(0.0, abs=1e-6)  # rounding of 1e-9 lam
    assert any("residual degrees of freedom" in w for w in est.warnings)
    # 32 readings of a smooth field with strong smoothing keep many: no warning
    th = np.linspace(0, 2 * np.pi, 32, endpoint=False)
    df = pd.DataFrame({"x": np.cos(th), "y": np.sin(th), "value": 20 + np.cos(th),
                       "sigma": 0.05})
    with warnings.catch_warnings():
        warnings.simplefilter("error", FitWarning)
        est = fit(df, radius=1.0, n_modes=8, rule="fixed", lam=10.0)
    assert est.info["residual_dof"] > 3


def test_ball_demo_summary_warns_about_residual_dof(tmp_path):
    out = tmp_path / "ball"
    s = run_fit(ROOT / "datasets" / "ball_readings.csv", radius=1.2, out=out, domain="ball",
                method="tikhonov", say=lambda s: None)
    assert s["residual_dof"] < 3
    saved = json.loads((out / "summary.json").read_text())
    assert any("residual degrees of freedom are left of 37" in w for w in saved["warnings"])


# --- Python entry points -----------------------------------------------------------------------
def test_from_readings_accepts_a_dataframe():
    from invert.workflow import make_domain

    df = pd.read_csv(DATA / "demo_readings.csv", comment="#")
    d = make_domain(0.25)
    a = LinearProblem.from_readings(df, d)
    b = LinearProblem.from_readings(Readings.from_frame(df), d)
    np.testing.assert_array_equal(a.G, b.G)
    np.testing.assert_array_equal(a.y, b.y)
    assert list(a.gap_sensor) == list(b.gap_sensor)
    with pytest.raises(TypeError, match="Readings or a pandas DataFrame"):
        LinearProblem.from_readings([1, 2], d)


def test_fit_names_every_method_and_rule_only_for_tikhonov():
    import invert

    doc = invert.fit.__doc__
    for m in invert.workflow.METHODS:
        assert f'"{m}"' in doc
    with pytest.raises(ValueError, match="tikhonov', 'gaussian', 'averaged', 'mcmc'"):
        invert.fit(pd.DataFrame(), method="nope")
    with pytest.raises(ValueError, match="belongs to method='tikhonov'"):
        invert.fit(pd.DataFrame(), method="gaussian", rule="gcv")
