"""Sensor readings: validated arrays, loaded from CSV files or pandas DataFrames.

A :class:`Readings` holds one snapshot: positions, values (NaN marks a sensor that gave no
reading, a *gap*, which is kept on record), optional per-reading noise sd, and sensor ids.
Validation happens here, once, where data enters; errors are :class:`InputError` lines naming
file, row and column.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from .._validation import parse_number, read_table
from ..errors import DomainError, InputError

__all__ = ["Readings", "load_readings", "load_points", "load_layout", "row_of", "check_inside"]


def row_of(rows, index):
    """Return the file row of data record ``index``: ``rows[index]``, the first when None.

    Parameters
    ----------
    rows : ndarray of int
        Row of each record in its file (1-based, header = row 1, comment and blank lines
        counted), as :func:`~invert._validation.read_table` and the loaders here return them.
    index : int or None
        0-based record index (e.g. :attr:`~invert.errors.DomainError.index`).

    Returns
    -------
    int
    """
    return int(rows[0 if index is None else index])


def check_inside(domain, points, rows, source):
    """Locate ``points`` in ``domain``; a point outside is an error naming its file row.

    Parameters
    ----------
    domain : Domain
    points : ndarray of shape (n_points, dim)
    rows : ndarray of int
        File row of each point (see :func:`row_of`).
    source : str
        File name for the message.

    Returns
    -------
    tuple
        What ``domain.locate(points)`` returns.

    Raises
    ------
    InputError
        When ``domain.locate`` raises :class:`~invert.errors.DomainError`.
    """
    try:
        return domain.locate(points)
    except DomainError as exc:
        raise InputError(source, str(exc), row=row_of(rows, exc.index)) from None


@dataclass(frozen=True)
class Readings:
    """One snapshot of sensor readings.

    Attributes
    ----------
    points : ndarray of shape (n_sensors, dim)
        Positions in the frame of the domain (unit of the radius).
    value : ndarray of shape (n_sensors,)
        Readings; NaN where the sensor gave none (a gap).
    sigma : ndarray of shape (n_sensors,) or None
        Noise sd of each reading, or None when a common noise level is to be estimated.
    sensor : ndarray of str, shape (n_sensors,)
        Sensor ids.
    source : str
        Where the readings came from, for messages.
    rows : ndarray of int, shape (n_sensors,)
        Row of each reading in the source (1-based, header = row 1).
    """

    points: np.ndarray
    value: np.ndarray
    sigma: np.ndarray | None
    sensor: np.ndarray
    source: str = "<readings>"
    rows: np.ndarray = field(default=None)

    def __post_init__(self):
        if self.rows is None:
            object.__setattr__(self, "rows", np.arange(2, len(self.value) + 2))

    @property
    def observed(self) -> np.ndarray:
        """Mask of sensors that gave a reading."""
        return np.isfinite(self.value)

    @property
    def n_gaps(self) -> int:
        """Number of sensors without a reading."""
        return int((~self.observed).sum())

    def check_domain(self, domain):
        """Raise :class:`InputError` naming the row of the first point outside ``domain``.

        Returns the number of points moved onto the rim from just outside it.
        """
        _, _, n_snapped = check_inside(domain, self.points, self.rows, self.source)
        return n_snapped

    @classmethod
    def from_frame(cls, frame, *, source="<DataFrame>", dim=2, center=None):
        """Build readings from a pandas DataFrame with the READINGS.csv columns."""
        header = [str(c).strip().lower() for c in frame.columns]
        rows = [["" if _isblank(v) else str(v) for v in rec] for rec in frame.itertuples(False)]
        return _from_cells(header, rows, np.arange(2, len(rows) + 2), source, dim, center)


def _isblank(v):
    try:
        return v is None or (isinstance(v, float) and np.isnan(v))
    except TypeError:
        return False


def load_readings(path, *, dim=2, center=None) -> Readings:
    """Load READINGS.csv.

    Columns: ``x,y`` (and ``z`` when ``dim=3``) or ``r,theta_deg`` (disk only), ``value``;
    optional ``sigma`` and ``sensor``. A blank ``value`` is a gap. Lines starting with ``#`` are
    comments. ``r,theta_deg`` are relative to ``center`` (default the origin); ``x,y`` are in
    the frame in which ``center`` is given.

    Raises
    ------
    InputError
        Missing columns, text in numbers, NaN or infinite values, non-positive sigma, duplicate
        sensor ids with different positions, no usable reading, or an empty file.
    """
    source = Path(path).name
    header, rows, numbers = read_table(path, source=source)
    return _from_cells(header, rows, numbers, source, dim, center)


def _column(header, rows, numbers, source, name, *, allow_blank=False):
    j = header.index(name)
    return np.array(
        [parse_number(r[j], source, n, name, allow_blank=allow_blank)
         for r, n in zip(rows, numbers, strict=True)]
    )


def _positions(header, rows, numbers, source, dim, center=None):
    axes = ["x", "y", "z"][:dim]
    if all(a in header for a in axes):
        return np.column_stack([_column(header, rows, numbers, source, a) for a in axes])
    if dim == 2 and "r" in header and "theta_deg" in header:
        r = _column(header, rows, numbers, source, "r")
        t = np.deg2rad(_column(header, rows, numbers, source, "theta_deg"))
        bad = np.flatnonzero(r < 0)
        if bad.size:
            raise InputError(source, f"must be >= 0, got {r[bad[0]]:g}", row=int(numbers[bad[0]]),
                             column="r")
        c = (0.0, 0.0) if center is None else center
        return np.column_stack([c[0] + r * np.cos(t), c[1] + r * np.sin(t)])
    missing = [a for a in axes if a not in header]
    alt = " (or r,theta_deg)" if dim == 2 else ""
    raise InputError(source, f"missing required column(s) {', '.join(missing)}{alt}; "
                     f"found {', '.join(header) or 'none'}")


def _from_cells(header, rows, numbers, source, dim, center=None):
    if not rows:
        raise InputError(source, "has a header but no rows")
    points = _positions(header, rows, numbers, source, dim, center)
    if "value" not in header:
        raise InputError(source, f"missing required column 'value'; found {', '.join(header)}")
    value = _column(header, rows, numbers, source, "value", allow_blank=True)
    sigma = None
    if "sigma" in header:
        sigma = _column(header, rows, numbers, source, "sigma", allow_blank=True)
        blank = np.isnan(sigma)
        if blank.all():
            sigma = None
        else:
            bad = np.flatnonzero(blank & np.isfinite(value))
            if bad.size:
                raise InputError(source, "is blank; give sigma for every reading or for none",
                                 row=int(numbers[bad[0]]), column="sigma")
            bad = np.flatnonzero(~blank & ~(sigma > 0))
            if bad.size:
                raise InputError(source, f"must be > 0, got {sigma[bad[0]]:g}",
                                 row=int(numbers[bad[0]]), column="sigma")
            sigma = np.where(blank, 1.0, sigma)
    if "sensor" in header:
        j = header.index("sensor")
        sensor = np.array([r[j] for r in rows], dtype=object)
        for i in np.flatnonzero(sensor == ""):
            sensor[i] = f"row{numbers[i]}"
        _check_duplicate_ids(sensor, points, numbers, source)
    else:
        sensor = np.array([f"row{n}" for n in numbers], dtype=object)
    if not np.isfinite(value).any():
        raise InputError(source, "no usable reading: every 'value' is blank", column="value")
    return Readings(points, value, sigma, sensor.astype(str), source, numbers)


def _check_duplicate_ids(sensor, points, numbers, source):
    first = {}
    for i, sid in enumerate(sensor):
        if sid in first:
            k = first[sid]
            atol = 1e-9 * (1 + np.abs(points[k]).max())
            if not np.allclose(points[i], points[k], rtol=0, atol=atol):
                raise InputError(
                    source,
                    f"sensor '{sid}' appears again at a different position (first at row "
                    f"{numbers[k]})",
                    row=int(numbers[i]),
                    column="sensor",
                )
        else:
            first[sid] = i


def _read_with_columns(path, required, dim):
    """Read a table that must have rows and the columns ``required`` plus the axes."""
    source = Path(path).name
    header, rows, numbers = read_table(path, source=source)
    if not rows:
        raise InputError(source, "has a header but no rows")
    axes = ["x", "y", "z"][:dim]
    missing = [a for a in [*required, *axes] if a not in header]
    if missing:
        raise InputError(source, f"missing required column(s) {', '.join(missing)}; "
                         f"found {', '.join(header)}")
    return source, header, rows, numbers, axes


def load_points(path, *, dim=2):
    """Load POINTS.csv: ``x,y[,z]`` and optional ``label``.

    Returns
    -------
    points : ndarray of shape (n_points, dim)
    labels : ndarray of str
    rows : ndarray of int
    """
    source, header, rows, numbers, axes = _read_with_columns(path, [], dim)
    pts = np.column_stack([_column(header, rows, numbers, source, a) for a in axes])
    if "label" in header:
        j = header.index("label")
        labels = np.array([r[j] or f"p{k + 1}" for k, r in enumerate(rows)], dtype=str)
    else:
        labels = np.array([f"p{k + 1}" for k in range(len(rows))], dtype=str)
    return pts, labels, numbers


def load_layout(path, *, dim=2):
    """Load LAYOUT.csv: ``sensor,x,y[,z][,sigma]``.

    Returns
    -------
    sensor : ndarray of str
    points : ndarray of shape (n_sensors, dim)
    sigma : ndarray or None
    rows : ndarray of int
    """
    source, header, rows, numbers, axes = _read_with_columns(path, ["sensor"], dim)
    j = header.index("sensor")
    sensor = np.array([r[j] for r in rows], dtype=object)
    blank = np.flatnonzero(sensor == "")
    if blank.size:
        raise InputError(source, "sensor id is blank", row=int(numbers[blank[0]]), column="sensor")
    seen = {}
    for i, sid in enumerate(sensor):
        if sid in seen:
            raise InputError(source, f"sensor '{sid}' is listed twice (first at row {seen[sid]})",
                             row=int(numbers[i]), column="sensor")
        seen[sid] = int(numbers[i])
    pts = np.column_stack([_column(header, rows, numbers, source, a) for a in axes])
    sigma = None
    if "sigma" in header:
        sigma = _column(header, rows, numbers, source, "sigma")
        bad = np.flatnonzero(~(sigma > 0))
        if bad.size:
            raise InputError(source, f"must be > 0, got {sigma[bad[0]]:g}",
                             row=int(numbers[bad[0]]), column="sigma")
    return sensor.astype(str), pts, sigma, numbers
