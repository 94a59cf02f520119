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

from .._validation import parse_number
from ..errors import DomainError, InputError
from .checks import check_magnitudes, check_polar_agrees, check_sensor_ids, coincident_notes
from .dialect import read_table, to_number_text

__all__ = ["Readings", "load_readings", "load_points", "load_layout", "load_trusted", "row_of",
           "check_inside"]


def row_of(rows, index):
    """Return the file row of data record ``index``: ``rows[index]``, the first when None.

    Parameters
    ----------
    rows : ndarray of int
        Row of each record in its file (1-based, header = row 1, comment and blank lines
        counted), as :func:`~invert.io.dialect.read_table` and the loaders here return them.
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
    notes : tuple of str
        What was assumed while reading (the file's delimiter, decimal mark or encoding,
        readings repeated at one position); the fit passes them on as warnings into
        summary.json.
    """

    points: np.ndarray
    value: np.ndarray
    sigma: np.ndarray | None
    sensor: np.ndarray
    source: str = "<readings>"
    rows: np.ndarray = field(default=None)
    notes: tuple = ()

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


def load_readings(path, *, dim=2, center=None, sep=None, decimal=None) -> Readings:
    """Load READINGS.csv.

    Columns: ``x,y`` (and ``z`` when ``dim=3``) or ``r,theta_deg`` (disk only), ``value``;
    optional ``sigma`` and ``sensor``. A blank ``value`` is a gap. Lines starting with ``#`` are
    comments. ``r,theta_deg`` are relative to ``center`` (default the origin); ``x,y`` are in
    the frame in which ``center`` is given. The delimiter (comma, semicolon, tab), decimal
    mark and encoding are detected unless ``sep``/``decimal`` are given
    (:func:`~invert.io.dialect.read_table`); what was assumed is in ``Readings.notes``.

    Raises
    ------
    InputError
        Missing columns, text in numbers, NaN, infinite or overflowing values, non-positive
        sigma, a repeated sensor id, a ``z`` column for a disk, ``x,y`` and ``r,theta_deg``
        that disagree, no usable reading, or an empty file.
    """
    source = Path(path).name
    header, rows, numbers, dialect = read_table(path, source=source, sep=sep, decimal=decimal)
    return _from_cells(header, rows, numbers, source, dim, center, decimal=dialect.decimal,
                       notes=dialect.notes)


class _Cells:
    """The parsed cells of a table, with the file's decimal mark, read column by column."""

    def __init__(self, header, rows, numbers, source, decimal="."):
        self.header, self.rows, self.numbers = header, rows, numbers
        self.source, self.decimal = source, decimal

    def __contains__(self, name):
        return name in self.header

    def column(self, name, *, allow_blank=False):
        j = self.header.index(name)
        return np.array(
            [parse_number(to_number_text(r[j], self.decimal), self.source, n, name,
                          allow_blank=allow_blank)
             for r, n in zip(self.rows, self.numbers, strict=True)]
        )

    def text(self, name):
        j = self.header.index(name)
        return np.array([r[j] for r in self.rows], dtype=object)


def _polar(t, center):
    r = t.column("r")
    theta = np.deg2rad(t.column("theta_deg"))
    bad = np.flatnonzero(r < 0)
    if bad.size:
        raise InputError(t.source, f"must be >= 0, got {r[bad[0]]:g}",
                         row=int(t.numbers[bad[0]]), column="r")
    c = (0.0, 0.0) if center is None else center
    return np.column_stack([c[0] + r * np.cos(theta), c[1] + r * np.sin(theta)])


def _positions(t, dim, center=None):
    """Positions and notes; a ``z`` column for a disk and disagreeing x,y / r,theta are errors."""
    axes = ["x", "y", "z"][:dim]
    if dim == 2 and "z" in t:
        raise InputError(t.source, "readings with a 'z' column are in a ball, but the region "
                         "is a disk (x, y): give --domain ball (kind='ball' in invert.fit), "
                         "or drop the column", column="z")
    polar = dim == 2 and "r" in t and "theta_deg" in t
    if all(a in t for a in axes):
        xy = np.column_stack([t.column(a) for a in axes])
        if polar:
            return xy, [check_polar_agrees(xy, _polar(t, center), t.numbers, t.source)]
        return xy, []
    if polar:
        return _polar(t, center), []
    missing = [a for a in axes if a not in t]
    alt = " (or r,theta_deg)" if dim == 2 else ""
    raise InputError(t.source, f"missing required column(s) {', '.join(missing)}{alt}; "
                     f"found {', '.join(t.header) or 'none'}")


def _sigma(t, value):
    if "sigma" not in t:
        return None
    sigma = t.column("sigma", allow_blank=True)
    blank = np.isnan(sigma)
    if blank.all():
        return None
    bad = np.flatnonzero(blank & np.isfinite(value))
    if bad.size:
        raise InputError(t.source, "is blank; give sigma for every reading or for none",
                         row=int(t.numbers[bad[0]]), column="sigma")
    bad = np.flatnonzero(~blank & ~(sigma > 0))
    if bad.size:
        raise InputError(t.source, f"must be > 0, got {sigma[bad[0]]:g}",
                         row=int(t.numbers[bad[0]]), column="sigma")
    return np.where(blank, 1.0, sigma)


def _from_cells(header, rows, numbers, source, dim, center=None, *, decimal=".", notes=()):
    if not rows:
        raise InputError(source, "has a header but no rows")
    t = _Cells(header, rows, numbers, source, decimal)
    points, pos_notes = _positions(t, dim, center)
    if "value" not in t:
        raise InputError(source, f"missing required column 'value'; found {', '.join(header)}")
    value = t.column("value", allow_blank=True)
    sigma = _sigma(t, value)
    check_magnitudes(value, sigma, numbers, source)
    if "sensor" in t:
        sensor = t.text("sensor")
        for i in np.flatnonzero(sensor == ""):
            sensor[i] = f"row{numbers[i]}"
        check_sensor_ids(sensor, numbers, source)
    else:
        sensor = np.array([f"row{n}" for n in numbers], dtype=object)
    if not np.isfinite(value).any():
        raise InputError(source, "no usable reading: every 'value' is blank", column="value")
    notes = (*notes, *pos_notes, *coincident_notes(points, value, sensor, numbers, source))
    return Readings(points, value, sigma, sensor.astype(str), source, numbers, tuple(notes))


def _read_with_columns(path, required, dim, sep=None, decimal=None, polar=False):
    """Read a table that must have rows and the columns ``required`` plus the axes.

    With ``polar`` a plane table may give ``r,theta_deg`` instead of ``x,y``.
    """
    source = Path(path).name
    header, rows, numbers, dialect = read_table(path, source=source, sep=sep, decimal=decimal)
    if not rows:
        raise InputError(source, "has a header but no rows")
    axes = ["x", "y", "z"][:dim]
    if polar and dim == 2 and "r" in header and "theta_deg" in header:
        axes = []
    missing = [a for a in [*required, *axes] if a not in header]
    if missing:
        raise InputError(source, f"missing required column(s) {', '.join(missing)}; "
                         f"found {', '.join(header)}")
    return _Cells(header, rows, numbers, source, dialect.decimal), axes


def load_points(path, *, dim=2, sep=None, decimal=None):
    """Load POINTS.csv: ``x,y[,z]`` and optional ``label``.

    Returns
    -------
    points : ndarray of shape (n_points, dim)
    labels : ndarray of str
    rows : ndarray of int
    """
    t, axes = _read_with_columns(path, [], dim, sep, decimal)
    pts = np.column_stack([t.column(a) for a in axes])
    n = len(t.rows)
    if "label" in t:
        labels = np.array([c or f"p{k + 1}" for k, c in enumerate(t.text("label"))], dtype=str)
    else:
        labels = np.array([f"p{k + 1}" for k in range(n)], dtype=str)
    return pts, labels, t.numbers


def load_layout(path, *, dim=2, sep=None, decimal=None, center=None):
    """Load LAYOUT.csv: ``sensor,x,y[,z][,sigma]`` (a plane layout may give ``r,theta_deg``).

    ``r,theta_deg`` are relative to ``center`` (default the origin); given with ``x,y`` they
    must agree, as for readings.

    Returns
    -------
    sensor : ndarray of str
    points : ndarray of shape (n_sensors, dim)
    sigma : ndarray or None
    rows : ndarray of int
    """
    t, _ = _read_with_columns(path, ["sensor"], dim, sep, decimal, polar=True)
    source, numbers = t.source, t.numbers
    sensor = t.text("sensor")
    blank = np.flatnonzero(sensor == "")
    if blank.size:
        raise InputError(source, "sensor id is blank", row=int(numbers[blank[0]]), column="sensor")
    seen = {}
    for i, sid in enumerate(sensor):
        if sid in seen:
            raise InputError(source, f"sensor '{sid}' is listed twice (first at row {seen[sid]})",
                             row=int(numbers[i]), column="sensor")
        seen[sid] = int(numbers[i])
    axes = ["x", "y", "z"][:dim]
    if all(a in t for a in axes):
        pts = np.column_stack([t.column(a) for a in axes])
        if dim == 2 and "r" in t and "theta_deg" in t:
            check_polar_agrees(pts, _polar(t, center), numbers, source)
    else:
        pts = _polar(t, center)
    sigma = None
    if "sigma" in t:
        sigma = t.column("sigma")
        bad = np.flatnonzero(~(sigma > 0))
        if bad.size:
            raise InputError(source, f"must be > 0, got {sigma[bad[0]]:g}",
                             row=int(numbers[bad[0]]), column="sigma")
    return sensor.astype(str), pts, sigma, numbers


#: Cells of a layout's ``trusted`` column (case-insensitive; blank is not trusted).
_TRUSTED = {"1": True, "true": True, "yes": True, "0": False, "false": False, "no": False,
            "": False}


def load_trusted(path, *, dim=2, sep=None, decimal=None):
    """Read LAYOUT.csv's optional ``trusted`` column (1/0, true/false, yes/no; blank: no).

    Returns
    -------
    ndarray of bool, shape (n_sensors,), or None
        None when the layout has no ``trusted`` column.

    Raises
    ------
    InputError
        A cell that is none of these, naming its row.
    """
    t, _ = _read_with_columns(path, ["sensor"], dim, sep, decimal)
    if "trusted" not in t:
        return None
    cells = [str(c).strip().lower() for c in t.text("trusted")]
    for i, c in enumerate(cells):
        if c not in _TRUSTED:
            raise InputError(t.source, f"must be 1/0, true/false or yes/no, got {c!r}",
                             row=int(t.numbers[i]), column="trusted")
    return np.array([_TRUSTED[c] for c in cells], bool)
