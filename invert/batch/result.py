"""The value :func:`~invert.batch.runner.run_batch` returns: the summary, shown in notebooks."""

from __future__ import annotations

import html

__all__ = ["BatchSummary"]


class BatchSummary(dict):
    """The summary written to summary.json (a plain ``dict``), with an HTML view.

    In a notebook the last expression ``run_batch(...)`` shows the frame counts, the fitted
    hyperparameters and time scale, the recursion and the warnings (``_repr_html_``, the
    IPython display protocol).
    """

    _ROWS = (("method", "method"), ("engine", "engine"), ("log", "log"),
             ("hyperparameters", "hyperparameters"), ("lam", "lam"), ("noise_sd", "noise sd"),
             ("time_scale", "time scale"), ("recursion", "recursion"), ("seconds", "seconds"))

    def _repr_html_(self):
        e = html.escape
        fr = self.get("frames", {})
        rows = [("frames", ", ".join(f"{v:,} {k}" for k, v in fr.items()))]
        rows += [(label, self[k]) for k, label in self._ROWS if self.get(k) is not None]
        body = "".join(f"<tr><th style='text-align:left'>{e(str(k))}</th>"
                       f"<td style='text-align:left'>{e(str(v))}</td></tr>" for k, v in rows)
        warn = "".join(f"<li>{e(str(w))}</li>" for w in self.get("warnings", []))
        return (f"<div><strong>rim-invert batch</strong><table>{body}</table>"
                + (f"<p>Warnings:</p><ul>{warn}</ul>" if warn else "") + "</div>")
