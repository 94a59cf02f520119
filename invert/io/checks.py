"""Checks of a snapshot's cells that need more than one cell: ids, positions, magnitudes.

Called by :mod:`invert.io.readings` once the columns are parsed. Each check either raises an
:class:`~invert.errors.InputError` naming the rows, or returns notes (sentences for
``Readings.notes``, which the fit passes on as warnings into summary.json).
"""

from __future__ import annotations

import numpy as np

from ..errors import InputError

__all__ = ["MAX_MAGNITUDE", "MIN_SIGMA", "check_magnitudes", "check_sensor_ids",
           "coincident_notes", "check_polar_agrees", "POLAR_TOL"]

#: Largest |value| or sigma taken: squares and sums of squares of numbers beyond ~1e154
#: overflow double precision (largest double ~1.8e308, IEEE 754), and the fit sums squares
#: of readings over many sensors; 1e100 leaves room for any physical unit.
MAX_MAGNITUDE = 1e100
#: Smallest sigma taken: the weights 1/sigma^2 of sigma below ~1e-154 overflow (same reason).
MIN_SIGMA = 1e-100
#: x,y and r,theta_deg given together agree when they differ by at most this share of the
#: largest r (the rim tolerance used when snapping sensors onto the rim is 1e-3 of R).
POLAR_TOL = 1e-3
#: Sensors named in one message.
_SHOWN = 5


def check_magnitudes(value, sigma, numbers, source):
    """Refuse values and sigmas whose squares would overflow (naming the row and column)."""
    big = np.flatnonzero(np.abs(np.nan_to_num(value)) > MAX_MAGNITUDE)
    if big.size:
        raise InputError(source, f"{value[big[0]]:g} is too large to compute with (|value| must "
                         f"be below {MAX_MAGNITUDE:g}: squares would overflow); give the values "
                         f"in a larger unit", row=int(numbers[big[0]]), column="value")
    if sigma is None:
        return
    for bad, what in ((sigma > MAX_MAGNITUDE, f"above {MAX_MAGNITUDE:g}"),
                      (sigma < MIN_SIGMA, f"below {MIN_SIGMA:g} (its weight 1/sigma^2 would "
                                          f"overflow)")):
        i = np.flatnonzero(bad)
        if i.size:
            raise InputError(source, f"{sigma[i[0]]:g} is {what}: give sigma in the unit of "
                             f"the values, or leave it blank to estimate a common noise level",
                             row=int(numbers[i[0]]), column="sigma")


def check_sensor_ids(sensor, numbers, source):
    """Refuse sensor ids given more than once, or holding a line break (naming ids and rows)."""
    broken = [i for i, s in enumerate(sensor) if "\n" in s or "\r" in s]
    if broken:
        i = broken[0]
        raise InputError(source, f"sensor id {sensor[i]!r} holds a line break (a quoted cell "
                         f"running over two lines); write each id on one line",
                         row=int(numbers[i]), column="sensor")
    rows = {}
    for sid, n in zip(sensor, numbers, strict=True):
        rows.setdefault(str(sid), []).append(int(n))
    rep = sorted((r for r in rows.items() if len(r[1]) > 1), key=lambda r: r[1][1])
    if not rep:
        return
    (sid, where), others = rep[0], rep[1:]
    also = "; ".join(f"'{k}' (rows {', '.join(map(str, v))})" for k, v in others[:_SHOWN])
    more = f" and {len(others) - _SHOWN} more" if len(others) > _SHOWN else ""
    raise InputError(source, f"sensor '{sid}' is given again (first at row {where[0]}); each "
                     f"sensor needs its own id" + (f"; also repeated: {also}{more}" if also
                                                   else ""),
                     row=where[1], column="sensor")


def coincident_notes(points, value, sensor, numbers, source):
    """Return notes on readings at exactly one position (a copied row or position).

    Two sensors at one position with different values contradict each other (a copied
    position, a swapped channel): a note naming them and their values. The same value: a
    note that the reading seems to be given twice. Both readings are used. Positions must be
    equal as numbers: distinct sensors of a dense line may lie closer than any tolerance.
    """
    obs = np.isfinite(value)
    if obs.sum() < 2:
        return []
    idx = np.flatnonzero(obs)
    _, inverse, counts = np.unique(points[idx], axis=0, return_inverse=True,
                                   return_counts=True)
    notes = []
    groups = np.flatnonzero(counts > 1)
    for g in groups[:_SHOWN]:
        members = idx[inverse.ravel() == g]
        names = ", ".join(f"'{sensor[i]}' (row {int(numbers[i])}, {value[i]:.10g})"
                          for i in members)
        if np.ptp(value[members]) == 0:
            notes.append(f"{source}: readings {names} are at one position with the same value "
                         f"(given twice?); both are used, which counts the reading twice")
        else:
            notes.append(f"{source}: readings {names} are at one position but disagree; both "
                         f"are used (check the positions and channels)")
    if groups.size > _SHOWN:
        notes.append(f"{source}: {groups.size - _SHOWN} more position(s) hold more than one "
                     f"reading")
    return notes


def check_polar_agrees(xy, polar, numbers, source):
    """Compare positions given as x,y and as r,theta_deg; an error when they disagree.

    Returns
    -------
    str
        The note saying both were given and agree, and that x,y are used.
    """
    size = max(float(np.abs(polar).max(initial=0.0)), float(np.abs(xy).max(initial=0.0)),
               1e-300)
    d = np.hypot(*(xy - polar).T)
    bad = np.flatnonzero(d > POLAR_TOL * size)
    if bad.size:
        i = bad[0]
        raise InputError(source, f"x,y = ({xy[i, 0]:g}, {xy[i, 1]:g}) and r,theta_deg (giving "
                         f"({polar[i, 0]:g}, {polar[i, 1]:g})) disagree; give one of them",
                         row=int(numbers[i]))
    return (f"{source}: positions given both as x,y and as r,theta_deg; they agree (within "
            f"{POLAR_TOL:g} of the largest radius) and x,y are used")
