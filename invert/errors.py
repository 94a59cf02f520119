"""Every error and warning class of ``invert``, in one place so users can catch or filter them.

Errors are ``ValueError`` subclasses (bad input); warnings are ``UserWarning`` subclasses that
also land in :attr:`~invert.problem.Estimate.warnings` and so in ``summary.json``.
"""

from __future__ import annotations

__all__ = ["InputError", "DomainError", "FitWarning", "MCMCWarning", "ModelCheckWarning"]


class InputError(ValueError):
    """Bad input: one line naming the source, row or column, and the problem.

    Attributes
    ----------
    source : str
        File name (or ``"<DataFrame>"``).
    row : int or None
        1-based line number in the file (the header is row 1), as a spreadsheet shows it.
    column : str or None
    problem : str
    """

    def __init__(self, source, problem, *, row=None, column=None):
        self.source, self.problem, self.row, self.column = str(source), problem, row, column
        parts = [self.source]
        if row is not None:
            parts.append(f"row {row}")
        if column is not None:
            parts.append(f"column '{column}'")
        super().__init__(", ".join(parts) + ": " + problem)


class DomainError(ValueError):
    """A point lies outside the region; ``index`` gives the offending row (0-based)."""

    def __init__(self, message: str, index: int | None = None):
        super().__init__(message)
        self.index = index


class FitWarning(UserWarning):
    """Numerical or statistical trouble in a fit; the message carries advice and values."""


class MCMCWarning(FitWarning):
    """Sampling trouble (convergence, effective sample size, influential or faulty sensors)."""


class ModelCheckWarning(UserWarning):
    """The readings contradict a harmonic field; intervals from the fit are not to be trusted."""
