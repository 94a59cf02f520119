"""Shared pieces of every figure, and the figures that do not depend on the domain.

Colours, the matplotlib import, saving; residuals per sensor and MCMC traces.

matplotlib is imported inside :func:`mpl_pyplot`, only when something is drawn.
"""

from __future__ import annotations

import numpy as np

__all__ = ["BAND", "LINE", "GAP", "READ", "WARN", "mpl_pyplot", "axis_label", "save_figure",
           "plot_residuals", "plot_traces"]

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


def axis_label(text, unit):
    """``text (unit)``, or ``text`` without a unit."""
    return f"{text} ({unit})" if unit else text


def save_figure(plt, fig, path):
    """Save ``fig`` as a 100-dpi PNG at ``path``, close it and return ``path``."""
    fig.savefig(path, dpi=100)
    plt.close(fig)
    return path



def plot_residuals(ax, check):
    """Standardised residual and leave-one-out z per sensor, with ±2 guide lines."""
    k = np.arange(len(check.sensor))
    ax.bar(k - 0.2, check.std_residual, width=0.4, color=BAND, edgecolor=LINE,
           label="residual / noise sd")
    ax.bar(k + 0.2, check.loo_z, width=0.4, color=GAP, edgecolor=WARN,
           label="leave-one-out z")
    for v in (-2, 2):
        ax.axhline(v, color="grey", lw=0.7, ls=":")
    ax.axhline(0, color="k", lw=0.6)
    ax.set_xticks(k)
    ax.set_xticklabels(check.sensor, rotation=90, fontsize=7)
    ax.set_ylabel("standardised value (noise sd units)")
    ax.set_title("residuals per sensor")
    ax.legend(fontsize=7)


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


def plot_traces(fig, posterior, max_chains=8):
    """Plot MCMC traces of the sampled scalar variables.

    MCMC traces of the sampled scalar posterior variables (up to ``max_chains`` chains, one
    colour each) beside a histogram of all draws; returns False when there is nothing to draw.
    """
    arrays = [(n, a) for n, a in _trace_arrays(posterior) if np.ptp(a) > 0]
    if not arrays:
        return False
    axes = np.atleast_2d(fig.subplots(len(arrays), 2, width_ratios=[3, 1], squeeze=False))
    for (ax, axh), (name, a) in zip(axes, arrays):
        for ch in a[:max_chains]:
            ax.plot(ch, lw=0.7, alpha=0.85)
        ax.set_ylabel(name, fontsize=8)
        axh.hist(a.ravel(), bins=40, orientation="horizontal", color=BAND, edgecolor=LINE,
                 lw=0.3)
        axh.set_ylim(ax.get_ylim())
        axh.set_yticklabels([])
    n_ch = min(len(arrays[0][1]), max_chains)
    axes[-1, 0].set_xlabel("draw (after burn-in and thinning)")
    axes[-1, 1].set_xlabel("draws (all chains)")
    axes[0, 0].set_title(f"MCMC traces ({n_ch} of {len(arrays[0][1])} chains shown)")
    axes[0, 1].set_title("distribution")
    return True
