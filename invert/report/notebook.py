"""HTML views for notebooks (the IPython display protocol's ``_repr_html_``)."""

from __future__ import annotations

import html

import numpy as np

__all__ = ["estimate_html"]


def estimate_html(est, level=0.9):
    """Return a short HTML summary of an :class:`~invert.problem.Estimate`.

    The method, the domain, the noise level and the prior's scale and smoothness, the value at
    the centre with its central interval, and the warnings, every string escaped.
    """
    e = html.escape
    rows = [("method", est.method or "?")]
    if est.domain is not None and hasattr(est.domain, "describe"):
        d = est.domain.describe()
        rows.append(("domain", ", ".join(f"{k} {v}" for k, v in d.items())))
    if est.noise_sd is not None:
        rows.append(("noise sd", f"{est.noise_sd:.4g}"))
    if est.prior is not None and est.prior.tau is not None:
        rows.append(("prior", f"tau {est.prior.tau:.4g}, s {est.prior.s}"))
    centre = getattr(est.domain, "center", None)
    if centre is not None:
        try:
            c = est.at(np.atleast_2d(np.asarray(centre, float)), level)
            rows.append((f"at the centre ({level:.0%})", f"{c.mean[0]:.6g} "
                         f"[{c.lower[0]:.6g}, {c.upper[0]:.6g}]"))
        except Exception:  # noqa: BLE001 - a view must not fail on an odd estimate
            pass
    rows.append(("coefficients", str(np.size(est.mean))))
    body = "".join(f"<tr><th style='text-align:left'>{e(str(k))}</th>"
                   f"<td style='text-align:left'>{e(str(v))}</td></tr>" for k, v in rows)
    warn = "".join(f"<li>{e(str(w))}</li>" for w in est.warnings)
    return (f"<div><strong>rim-invert estimate</strong><table>{body}</table>"
            + (f"<p>Warnings:</p><ul>{warn}</ul>" if warn else "") + "</div>")
