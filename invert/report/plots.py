"""Shared pieces of every figure, and the figures that do not depend on the domain.

Colours, the matplotlib import, saving; residuals per sensor and MCMC traces.

matplotlib is imported inside :func:`mpl_pyplot`, only when something is drawn.
"""

from __future__ import annotations

import numpy as np

__all__ = ["BAND", "LINE", "GAP", "READ", "WARN", "VALUE", "LENGTH", "mpl_pyplot", "axis_label",
           "save_figure", "visible", "shorten", "literal_text", "plot_residuals", "plot_traces"]

#: What the axes say when no unit was given (values; lengths).
VALUE = "unit of the readings"
LENGTH = "unit of the radius"

# Plain, colour-blind-safe choices of our own.
BAND = "#b7d3ea"
LINE = "#1b4f8a"
GAP = "#f3c99b"
READ = "#222222"
WARN = "#b23a00"


def mpl_pyplot():
    """``matplotlib.pyplot`` with the Agg backend (no display needed)."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    return plt


def visible(text):
    r"""Return ``text`` with every non-printable character written as its escape (``\n``).

    User strings (units, labels, sensor ids) are shown literally: a newline or a NUL byte in
    a sensor id appears as ``\n`` or ``\x00`` instead of breaking a tick label or drawing a
    missing glyph. Printable characters, ``°`` and ``µ`` included, are kept as they are.
    """
    text = str(text)
    if text.isprintable():
        return text
    return "".join(c if c.isprintable() else repr(c)[1:-1] for c in text)


def shorten(text, width=14):
    """``visible(text)``, cut to ``width`` characters with a trailing ellipsis when longer."""
    text = visible(text)
    return text if len(text) <= width else text[:width - 1] + "…"


def axis_label(text, unit, neutral=""):
    """``text (unit)``; without a unit, ``text (neutral)`` or ``text``.

    ``neutral`` says what the unit is when none was given (``"unit of the readings"``).
    """
    unit = unit or neutral
    return f"{text} ({unit})" if unit else text


def literal_text(fig):
    """Draw every text of ``fig`` literally: no ``$...$`` mathematics (matplotlib mathtext).

    User strings reach titles, axis and colour-bar labels, legends and tick labels; matplotlib
    would read a unit such as ``$^$`` as mathematics and fail. The figures' own strings use no
    mathtext, so every text is switched off; tick labels made by a formatter (numbers, which
    may use mathtext on log axes) are left alone; labels of fixed ticks (sensor ids, set with
    ``set_ticks``/``set_ticklabels``) are not.
    """
    from matplotlib.text import Text
    from matplotlib.ticker import FixedLocator

    numeric = set()
    for ax in fig.axes:
        for axis in (ax.xaxis, ax.yaxis):
            if not isinstance(axis.get_major_locator(), FixedLocator):
                numeric.update(map(id, axis.get_ticklabels(which="major")))
            if not isinstance(axis.get_minor_locator(), FixedLocator):
                numeric.update(map(id, axis.get_ticklabels(which="minor")))
    for t in fig.findobj(Text):
        if id(t) not in numeric:
            t.set_parse_math(False)


def save_figure(plt, fig, path):
    """Save ``fig`` as a 100-dpi PNG at ``path`` (all text literal), close it, return ``path``."""
    import warnings

    literal_text(fig)
    with warnings.catch_warnings():
        # A character of a user string that the font lacks is drawn as an empty box; the full
        # string is in the CSV files and report.html, so matplotlib's per-glyph warning is noise.
        warnings.filterwarnings("ignore", message=r"Glyph \d+ .*missing from font",
                                category=UserWarning)
        fig.savefig(path, dpi=100)
    plt.close(fig)
    return path


def plot_residuals(ax, check, id_width=14):
    """Standardised residual and leave-one-out z per sensor, with ±2 guide lines.

    Sensor ids longer than ``id_width`` characters are shortened with an ellipsis.
    """
    k = np.arange(len(check.sensor))
    res, loo = (np.asarray(v, float) for v in (check.std_residual, check.loo_z))
    if len(k) > MANY_SENSORS:
        return _plot_many_residuals(ax, k, res, loo)
    # a value that is not finite (a reading with a vast sigma has no leave-one-out z) gets
    # no bar, which would overflow the axis transform, but a mark on the zero line
    bad = ~np.isfinite(res) | ~np.isfinite(loo)
    ax.bar(k - 0.2, np.where(np.isfinite(res), res, 0.0), width=0.4, color=BAND,
           edgecolor=LINE, label="residual / noise sd")
    ax.bar(k + 0.2, np.where(np.isfinite(loo), loo, 0.0), width=0.4, color=GAP,
           edgecolor=WARN, label="leave-one-out z")
    if bad.any():
        ax.plot(k[bad], np.zeros(bad.sum()), "x", color=READ, mew=1.5,
                label="not finite (no bar)")
    for v in (-2, 2):
        ax.axhline(v, color="grey", lw=0.7, ls=":")
    ax.axhline(0, color="k", lw=0.6)
    ax.set_xticks(k)
    # long ids are cut with an ellipsis (the full id is in summary.json and sensors.csv)
    ax.set_xticklabels([shorten(s, id_width) for s in check.sensor], rotation=90, fontsize=7)
    ax.set_ylabel("standardised value (noise sd units)")
    ax.set_title("residuals per sensor")
    ax.legend(fontsize=7, loc="upper left", bbox_to_anchor=(1.005, 1.0))


#: Above this many readings, per-reading figures draw points instead of bars and labels
#: (a bar and a tick label per reading cost minutes at 30,000 readings and show nothing).
MANY_SENSORS = 200


def _plot_many_residuals(ax, k, res, loo):
    """Residuals of many readings: points by reading number, rasterised; the worst named."""
    ok_r, ok_l = np.isfinite(res), np.isfinite(loo)
    ax.plot(k[ok_r], res[ok_r], ".", ms=2, color=LINE, alpha=0.6, rasterized=True,
            label="residual / noise sd")
    ax.plot(k[ok_l], loo[ok_l], ".", ms=2, color=WARN, alpha=0.4, rasterized=True,
            label="leave-one-out z")
    for v in (-2, 2):
        ax.axhline(v, color="grey", lw=0.7, ls=":")
    ax.axhline(0, color="k", lw=0.6)
    beyond = int(np.sum(np.abs(loo[ok_l]) > 3))
    ax.set_xlabel(f"reading (file order); {beyond} of {len(k)} beyond |z| = 3")
    ax.set_ylabel("standardised value (noise sd units)")
    ax.set_title("residuals per reading")
    ax.legend(fontsize=7, loc="upper left", bbox_to_anchor=(1.005, 1.0), markerscale=4)


def _trace_arrays(posterior, max_vars=6):
    # (name, array (chain, draw)) for scalar variables of the posterior group.
    try:
        post = posterior["posterior"]
        ds = post.to_dataset() if hasattr(post, "to_dataset") else post
    except Exception:
        return []
    out = []
    for name, da in ds.data_vars.items():
        if set(da.dims) == {"chain", "draw"}:
            out.append((str(name), np.asarray(da.transpose("chain", "draw").values)))
        if len(out) >= max_vars:
            break
    return out


def thin_trace(trace, max_draws=400):
    """Thin a recorded chain to at most ``max_draws`` draws per chain.

    Parameters
    ----------
    trace : dict
        ``{"names": [...], "values": array (chain, step, variable), "burn": int,
        "step": int}``: the sampler's chains after burn-in at every ``step``-th step (the
        ``trace`` extra of the MCMC stage).
    max_draws : int, default=400

    Returns
    -------
    arrays : list of (name, array (chain, draw))
    every : int
        Sampler steps between two plotted draws.
    """
    values = np.asarray(trace["values"], float)
    k = max(1, int(np.ceil(values.shape[1] / max_draws)))
    every = k * int(trace.get("step", 1))
    return [(str(n), values[:, ::k, j]) for j, n in enumerate(trace["names"])], every


def plot_traces(fig, posterior, max_chains=8, trace=None, max_draws=400):
    """Plot MCMC traces of the sampled scalar variables.

    MCMC traces (up to ``max_chains`` chains, one colour each) beside a histogram of all kept
    posterior draws. With ``trace`` (the sampler's chains after burn-in, see
    :func:`thin_trace`) the lines show up to ``max_draws`` draws per chain; else the kept
    draws of ``posterior``. Returns a caption note (what is shown), or None when there is
    nothing to draw.
    """
    kept = dict(_trace_arrays(posterior))
    if trace is not None:
        lines, every = thin_trace(trace, max_draws)
        note = f"every {every}th sampler step after burn-in" if every > 1 else \
            "every sampler step after burn-in"
    else:
        lines, note = list(kept.items()), "the kept posterior draws"
    lines = [(n, a) for n, a in lines if a.size and np.ptp(a) > 0]
    if not lines:
        return None
    axes = np.atleast_2d(fig.subplots(len(lines), 2, width_ratios=[3, 1], squeeze=False))
    for (ax, axh), (name, a) in zip(axes, lines):
        for ch in a[:max_chains]:
            ax.plot(ch, lw=0.6, alpha=0.8)
        ax.set_ylabel(name, fontsize=8)
        hist = kept.get(name, a)
        axh.hist(hist.ravel(), bins=40, orientation="horizontal", color=BAND, edgecolor=LINE,
                 lw=0.3)
        axh.set_ylim(ax.get_ylim())
        axh.set_yticklabels([])
    n_ch, n_draw = min(len(lines[0][1]), max_chains), lines[0][1].shape[1]
    total = len(next(iter(kept.values()))) if kept else len(lines[0][1])
    axes[-1, 0].set_xlabel(f"draw ({note})")
    axes[-1, 1].set_xlabel("kept draws (all chains)")
    axes[0, 0].set_title(f"MCMC traces ({n_ch} of {total} chains, {n_draw} draws each)")
    axes[0, 1].set_title("distribution")
    return f"{n_ch} of {total} chains, {n_draw} draws each ({note})"


def check_and_trace_figures(plt, out, estimate, check, trace_note=""):
    """Draw the residual figure (when a model check ran) and the MCMC trace figure (if drawn).

    Returns a list of ``(path, caption)``; ``trace_note`` is appended to the trace caption.
    """
    figs = []
    if check is not None:
        fig, ax = plt.subplots(figsize=(9, 3.6), layout="constrained")
        plot_residuals(ax, check)
        figs.append((save_figure(plt, fig, out / "residuals.png"),
                     "Residual of the fit over the noise sd, and the leave-one-out z of each "
                     "reading (its distance from what the other readings predict)."))
    post = estimate.extras.get("posterior") if estimate.extras else None
    if post is not None:
        fig = plt.figure(figsize=(9, 5.5), layout="constrained")
        shown = plot_traces(fig, post, trace=estimate.extras.get("trace"))
        if shown:
            figs.append((save_figure(plt, fig, out / "traces.png"),
                         f"MCMC traces of the sampled hyperparameters: {shown}{trace_note}."))
        else:
            plt.close(fig)
    return figs
