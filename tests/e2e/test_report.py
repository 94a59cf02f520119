"""The HTML report: every figure embedded, every caution present, units shown, MCMC traces when
a posterior is present, the ball branch, and rendering in headless Chromium without console
errors (skipped when Chromium is not installed)."""

import base64
import html
import re
from pathlib import Path

import numpy as np
import pytest
from browser import chromium_path, render_in_chromium

from invert import LinearProblem, Readings
from invert.cli import run_fit
from invert.report.files import CAUTIONS
from invert.report.html import write_report
from invert.stages import Tikhonov

DATA = Path(__file__).resolve().parents[2] / "invert" / "data"


@pytest.fixture(scope="module")
def demo_report(tmp_path_factory):
    out = tmp_path_factory.mktemp("demo") / "out"
    run_fit(DATA / "demo_readings.csv", radius=0.25, out=out, query=DATA / "demo_query.csv",
            figures=True, threshold=95.0, unit="°C", length_unit="m", say=lambda s: None)
    return out


def _embedded_images(doc):
    return re.findall(r"src='data:image/png;base64,([A-Za-z0-9+/=]+)'", doc)


def test_every_figure_embedded_and_every_caution_present(demo_report):
    doc = (demo_report / "report.html").read_text(encoding="utf-8")
    pngs = sorted(demo_report.glob("*.png"))
    names = {p.name for p in pngs}
    assert {"rim_profile.png", "field_maps.png", "exceedance.png", "depth.png",
            "gap_dependence.png", "residuals.png"} <= names
    imgs = _embedded_images(doc)
    assert len(imgs) == len(pngs)
    for p in pngs:
        assert base64.b64encode(p.read_bytes()).decode("ascii") in imgs, p.name
    for raw in imgs:  # each embedded image is a PNG (signature, RFC 2083 / PNG spec 5.2)
        assert base64.b64decode(raw)[:8] == b"\x89PNG\r\n\x1a\n"
    for c in CAUTIONS:
        assert html.escape(c) in doc
    # Units, intervals, verdict, threshold result.
    assert "°C" in doc and "x (m)" not in doc  # axes carry units inside the PNGs; text here:
    assert "estimate °C" in doc and "90 % interval °C" in doc
    assert "id='verdict'" in doc
    assert "exceeds <b>95 °C</b> anywhere" in doc
    # Dependence on gaps for every query point (the demo asks about the centre itself, so it
    # is not repeated), with the half-mass arc width 4 arctan((1-rho)/(1+rho)) (Garnett &
    # Marshall ch. I; checked by quadrature in test_diagnose).
    import json

    summary = json.loads((demo_report / "summary.json").read_text())
    gaps = summary["diagnostics"]["gaps"]
    assert [p["label"] for p in gaps["points"]] == ["centre", "hot_side", "cold_side",
                                                    "gap_edge", "near_gap_rim"]
    for p in gaps["points"]:
        rho = np.hypot(p["x"], p["y"]) / 0.25
        assert p["half_mass_arc_deg"] == pytest.approx(
            np.rad2deg(4 * np.arctan((1 - rho) / (1 + rho))), rel=1e-12)
    assert "width of the rim arc holding half the weight" in doc
    # No script and no external resource: the report is self-contained.
    assert "<script" not in doc and "http://" not in doc and "https://" not in doc


@pytest.mark.slow
def test_report_renders_in_chromium_without_console_errors(demo_report, tmp_path):
    if not chromium_path():
        pytest.skip("chromium is not installed")
    # Negative control: the probe must see a console error and a broken image.
    bad = tmp_path / "bad.html"
    bad.write_text("<html><body><script>console.error('deliberate')</script>"
                   "<img alt='broken' src='data:image/png;base64,AAAA'></body></html>")
    console, dom = render_in_chromium(bad)
    assert any("deliberate" in ln for ln in console)
    assert any("image failed: broken" in ln for ln in console)
    # The report: no console message at all, and every image decoded.
    console, dom = render_in_chromium(demo_report / "report.html")
    assert console == []
    n = len(list(demo_report.glob("*.png")))
    assert f'data-loaded="{n}"' in dom
    assert "Cautions" in dom


def _small_fit():
    from invert import Disk

    d = Disk(1.0, (0.0, 0.0), 8)
    th = 2 * np.pi * np.arange(20) / 20
    pts = np.vstack([d.from_polar(1.0, th), [[0.0, 0.0], [0.3, 0.2]]])
    rng = np.random.default_rng(3)
    v = 10 + pts[:, 0] + 0.05 * rng.normal(size=len(pts))  # harmonic: 10 + x
    v[[4, 5]] = np.nan
    r = Readings(pts, v, np.full(len(v), 0.05), np.array([f"s{i}" for i in range(len(v))]))
    pb = LinearProblem.from_readings(r, d)
    return r, pb, Tikhonov("evidence").fit(pb)


def test_mcmc_traces_drawn_when_posterior_present(tmp_path):
    import dataclasses

    import arviz as az

    r, pb, est = _small_fit()
    rng = np.random.default_rng(0)
    post = az.from_dict({"posterior": {"tau": rng.normal(1, 0.1, (4, 200)),
                                       "noise_sd": rng.normal(0.05, 0.01, (4, 200))}})
    est2 = dataclasses.replace(est, extras={"posterior": post})
    write_report(tmp_path, est2, pb, r, unit="K", length_unit="cm")
    assert (tmp_path / "traces.png").exists()
    doc = (tmp_path / "report.html").read_text(encoding="utf-8")
    assert base64.b64encode((tmp_path / "traces.png").read_bytes()).decode() in doc
    assert "MCMC traces" in doc
    # Without a posterior the traces are skipped, not an error.
    out2 = tmp_path / "plain"
    out2.mkdir()
    write_report(out2, est, pb, r)
    assert not (out2 / "traces.png").exists()


def test_ball_branch_uses_ball_figures(tmp_path, monkeypatch):
    from invert.workflow import make_domain

    calls = []

    def write_figures_ball(out_dir, estimate, problem, readings, level, unit="", **_):
        import matplotlib

        matplotlib.use("Agg")
        import matplotlib.pyplot as plt

        calls.append(level)
        fig, ax = plt.subplots()
        ax.plot([0, 1], [0, 1])
        p = Path(out_dir) / "ball_slices.png"
        fig.savefig(p)
        plt.close(fig)
        return [p]

    import invert.report.ball_figures

    # The Ball entry of invert.report.figures.FIGURES calls ball_figures.write_figures_ball.
    monkeypatch.setattr(invert.report.ball_figures, "write_figures_ball", write_figures_ball)
    d = make_domain(1.0, kind="ball", s=2.0, n_modes=3)
    rng = np.random.default_rng(1)
    z = rng.normal(size=(40, 3))
    pts = np.vstack([z / np.linalg.norm(z, axis=1)[:, None], [[0, 0, 0], [0.2, 0.1, -0.3]]])
    v = 5 + pts[:, 0] + 0.05 * rng.normal(size=len(pts))
    r = Readings(pts, v, np.full(len(v), 0.05), np.array([f"b{i}" for i in range(len(v))]))
    pb = LinearProblem.from_readings(r, d)
    est = Tikhonov("evidence").fit(pb)
    write_report(tmp_path, est, pb, r, level=0.8)
    assert calls == [0.8]
    doc = (tmp_path / "report.html").read_text(encoding="utf-8")
    assert _embedded_images(doc) == [base64.b64encode((tmp_path / "ball_slices.png")
                                                      .read_bytes()).decode()]
    assert not (tmp_path / "rim_profile.png").exists()
    assert "centre (0, 0, 0)" in doc  # the summary table works in 3-D too
    for c in CAUTIONS:
        assert html.escape(c) in doc
