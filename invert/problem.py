r"""The linear problem every stage solves, and the one result type every stage returns.

Notes
-----
Readings are linear in the coefficient vector :math:`c`: :math:`y = G c + \varepsilon`,
:math:`\varepsilon \sim N(0, \operatorname{diag}(\sigma_i^2))`. A stage sees only ``G``, ``y``,
``sigma`` and the per-column degrees and rim eigenvalues; it never knows the shape of the
region. The domain object is carried along, untouched, so that an :class:`Estimate` can answer
at any point.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from types import MappingProxyType

import numpy as np
from scipy import linalg

from ._validation import check_level
from .intervals import PointSummary, interval_z
from .prior import truncation_degree

__all__ = ["LinearProblem", "Estimate", "PointSummary", "PriorSummary", "interval_z"]


@dataclass(frozen=True)
class LinearProblem:
    """Readings written as ``y = G c + noise``.

    Parameters
    ----------
    G : ndarray of shape (n_readings, n_coef)
        Design matrix of the observed readings.
    y : ndarray of shape (n_readings,)
        Observed values (gaps removed).
    sigma : ndarray of shape (n_readings,) or None
        Noise sd per reading; None means one common, unknown level to be estimated (the
        stages then work with unit weights and scale by the estimate).
    degrees : ndarray of int, shape (n_coef,)
        Degree of each column.
    eigenvalues : ndarray of shape (n_coef,)
        Rim Laplacian eigenvalue of each column's degree (for the smoothness prior).
    domain : object
        Carried to the estimate; used only to evaluate results at points.
    sensor : ndarray of str, shape (n_readings,)
    points : ndarray of shape (n_readings, dim)
    gap_sensor, gap_points : ndarray
        Sensors that gave no reading, kept on record for diagnostics.
    notes : tuple of str
        Facts about how the problem was built (e.g. points snapped onto the rim); stages
        pass them on as warnings.
    n_snapped : int
        Readings moved onto the rim from just outside it (reported in the summary).
    assembly_notes : tuple of str
        Choices the assembly layer made for the stage (e.g. the truncation degree raised for
        the roughest smoothness the stage tries, :func:`invert.workflow.problem_for_stage`);
        stages record them in ``Estimate.info["notes"]``, not as warnings.
    """

    G: np.ndarray
    y: np.ndarray
    sigma: np.ndarray | None
    degrees: np.ndarray
    eigenvalues: np.ndarray
    domain: object = None
    sensor: np.ndarray = None
    points: np.ndarray = None
    gap_sensor: np.ndarray = field(default_factory=lambda: np.array([], dtype=str))
    gap_points: np.ndarray = None
    notes: tuple = ()
    n_snapped: int = 0
    assembly_notes: tuple = ()

    def __post_init__(self):
        G = np.ascontiguousarray(self.G, dtype=float)  # row blocks contiguous
        y = np.asarray(self.y, dtype=float)
        if G.ndim != 2 or y.shape != (G.shape[0],):
            raise ValueError(f"G and y do not match: G has shape {G.shape}, y has shape {y.shape}.")
        if self.sigma is not None:
            s = np.asarray(self.sigma, dtype=float)
            if s.shape != y.shape or not np.all(s > 0):
                raise ValueError("sigma must be positive with one entry per reading.")
            object.__setattr__(self, "sigma", s)
        object.__setattr__(self, "G", G)
        object.__setattr__(self, "y", y)
        if self.sensor is None:
            object.__setattr__(self, "sensor", np.array([f"r{i}" for i in range(y.size)]))

    @property
    def n_readings(self) -> int:
        """Number of observed readings ``m``."""
        return self.G.shape[0]

    @property
    def n_coef(self) -> int:
        """Number of coefficients ``p``."""
        return self.G.shape[1]

    @property
    def weights(self) -> np.ndarray:
        """``1/sigma`` per reading (ones when the noise level is unknown)."""
        return np.ones(self.n_readings) if self.sigma is None else 1.0 / self.sigma

    @property
    def n_modes(self):
        """Truncation degree of the domain the design was built on (None without a domain)."""
        return getattr(self.domain, "n_modes", None)

    def truncation_holds(self, s) -> bool:
        """Check the truncation against the prior with smoothness ``s``.

        Whether the truncation keeps the prior with smoothness ``s`` to the domain's
        tolerance (``domain.truncation_rule()``, :func:`invert.prior.truncation_degree`).

        True when the problem carries no domain with a truncation degree (nothing to check).
        """
        dom = self.domain
        if dom is None or not hasattr(dom, "n_modes"):
            return True
        tol = dom.truncation_rule()[0]
        return truncation_degree(dom, s, tol=tol) <= dom.n_modes

    def truncation_floor(self, s_lo, s_hi) -> float:
        """Find the smallest ``s`` in ``[s_lo, s_hi]`` the truncation supports.

        Smallest ``s`` in ``[s_lo, s_hi]`` whose prior the truncation holds (see
        :meth:`truncation_holds`; bisection on the monotone
        :func:`invert.prior.truncation_degree`, 40 halvings).
        """
        if self.truncation_holds(s_lo):
            return s_lo
        lo, hi = s_lo, s_hi
        for _ in range(40):
            mid = 0.5 * (lo + hi)
            if self.truncation_holds(mid):
                hi = mid
            else:
                lo = mid
        return hi

    def rotated_design(self, angle) -> np.ndarray:
        """Design rows of the readings with each sensor turned about the centre by ``angle``.

        Parameters
        ----------
        angle : ndarray of shape (n_batch, n_readings)
            Turn of each sensor, radians (counter-clockwise).

        Returns
        -------
        ndarray of shape (n_batch, n_readings, n_coef)

        Raises
        ------
        ValueError
            When the problem has no sensor points or its domain cannot turn points
            (``domain.rotated_design(points, angle)``).
        """
        angle = np.atleast_2d(np.asarray(angle, float))
        if self.points is None or self.domain is None:
            raise ValueError("Turning sensors needs a problem built from sensor points "
                             "(LinearProblem.from_readings); this one has none.")
        turn = getattr(self.domain, "rotated_design", None)
        if turn is None:
            raise ValueError(f"The domain {type(self.domain).__name__} cannot turn sensor points "
                             f"about its centre (no rotated_design method); the angle-error "
                             f"model needs it.")
        G = turn(self.points, angle)
        return G.reshape(angle.shape[0], self.n_readings, self.n_coef)

    @classmethod
    def from_readings(cls, readings, domain):
        """Build the problem from a :class:`~invert.io.readings.Readings` snapshot.

        ``readings`` may also be a pandas DataFrame with the READINGS.csv columns (``x, y``
        [``z``], ``value``, optional ``sigma, sensor``), read as
        :func:`invert.load_readings` reads a file. Gaps are dropped from ``G`` and ``y`` but
        kept in ``gap_sensor``/``gap_points``.
        """
        readings = readings_from(readings, domain)
        n_snapped = readings.check_domain(domain)
        obs = readings.observed
        G = domain.design(readings.points[obs])
        notes = []
        try:  # more than 1e-4 R outside is more than rounding of typed coordinates
            domain.locate(readings.points, tol=1e-4)
        except ValueError:
            notes.append(f"{n_snapped} sensor position(s) lay outside the rim by more than 1e-4 "
                         f"of the radius (within the 1e-3 tolerance) and were taken to be on "
                         f"the rim; check the layout")
        return cls(
            G=G,
            y=readings.value[obs],
            sigma=None if readings.sigma is None else readings.sigma[obs],
            degrees=domain.degrees,
            eigenvalues=domain.eigenvalues,
            domain=domain,
            sensor=readings.sensor[obs],
            points=readings.points[obs],
            gap_sensor=readings.sensor[~obs],
            gap_points=readings.points[~obs],
            notes=tuple(notes),
            n_snapped=n_snapped,
        )

    def subset(self, keep):
        """Return the same problem restricted to the readings in ``keep`` (mask or indices)."""
        keep = np.asarray(keep)
        return LinearProblem(
            self.G[keep], self.y[keep], None if self.sigma is None else self.sigma[keep],
            self.degrees, self.eigenvalues, self.domain, self.sensor[keep],
            None if self.points is None else self.points[keep], self.gap_sensor,
            self.gap_points, self.notes, self.n_snapped, self.assembly_notes,
        )


@dataclass(frozen=True, eq=False)
class PriorSummary:
    r"""The smoothness prior a stage ended with.

    The smoothness prior a stage ended with: :math:`\operatorname{Var} c_n = \tau^2
    (1+\lambda_n)^{-s}` (mean level broad).

    Parameters
    ----------
    s, tau : float or None
        Smoothness order and prior scale (posterior medians for sampled stages; None when the
        stage has no prior, e.g. a Kalman smoother whose dynamics carry it).
    s_draws, tau_draws : ndarray of shape (n_draws,) or None
        Posterior draws of ``s`` and ``tau`` for sampled stages.
    variances : ndarray of shape (n_coef,) or None
        Prior variance of each coefficient when it is not ``tau^2 (1+lambda_n)^(-s)`` of one
        ``(s, tau)``: for a stage averaging over them, the weighted mean of the components'
        prior variances (the diagnostics compare posterior with prior variances).
    """

    s: float | None = None
    tau: float | None = None
    s_draws: np.ndarray | None = None
    tau_draws: np.ndarray | None = None
    variances: np.ndarray | None = None

    @property
    def known(self) -> bool:
        """Whether both ``s`` and ``tau`` are set."""
        return self.s is not None and self.tau is not None


@dataclass(frozen=True, eq=False)
class Estimate:
    r"""Result of any stage: the coefficient posterior (Gaussian or draws) and its metadata.

    Parameters
    ----------
    mean : ndarray of shape (n_coef,)
        Posterior mean (or point estimate) of the coefficients.
    cov : ndarray of shape (n_coef, n_coef) or None
        Posterior covariance, for Gaussian results.
    draws : ndarray of shape (n_draws, n_coef) or None
        Posterior draws, for sampled results; summaries then use the draws.
    domain : object
        Evaluates the field at points (``design``, ``field``).
    method : str
        The stage that produced the estimate.
    noise_sd : float or None
        Noise sd used or estimated for a new reading (adds to predictive intervals).
    prior : PriorSummary
        The prior's ``s`` and ``tau`` (and their draws for sampled stages).
    df : float or None
        Degrees of freedom of a Student-t posterior (``cov`` is then its scale matrix and
        intervals use t quantiles); None for a Gaussian posterior.
    info : mapping
        Chosen parameters and fit statistics, as written to ``summary.json``.
    warnings : tuple of str
        Everything the user should know about this fit.
    extras : mapping
        Stage-specific artefacts written beside the standard files when present:
        ``"posterior"`` (an arviz/xarray DataTree, written as ``posterior.nc``) and
        ``"sensor_table"`` (a pandas DataFrame with one row per sensor, written as
        ``sensors.csv``); ``"timing_s"`` (seconds per phase of an MCMC fit, not written).

    Notes
    -----
    For a Gaussian result the field at points with design :math:`H` has mean :math:`H\bar c`
    and covariance :math:`H \Sigma H^\top`; the central interval at level :math:`\ell` is
    :math:`\bar u \pm z_{(1+\ell)/2}\,\mathrm{sd}`; with ``df`` set, the scale is
    :math:`\sqrt{h^\top\Sigma h}` and :math:`z` is the Student-t quantile. For draws, the
    interval is the pair of empirical quantiles :math:`(1\mp\ell)/2`.
    """

    mean: np.ndarray
    cov: np.ndarray | None = None
    draws: np.ndarray | None = None
    domain: object = None
    method: str = ""
    noise_sd: float | None = None
    df: float | None = None
    info: dict = field(default_factory=dict)
    warnings: tuple = ()
    prior: PriorSummary = field(default_factory=PriorSummary)
    extras: dict = field(default_factory=dict)

    def __post_init__(self):
        object.__setattr__(self, "mean", np.asarray(self.mean, dtype=float))
        object.__setattr__(self, "info", MappingProxyType(dict(self.info)))
        object.__setattr__(self, "warnings", tuple(self.warnings))
        if self.cov is None and self.draws is None:
            raise ValueError("An Estimate needs either cov or draws.")
        root = None
        if self.cov is not None:
            cov = 0.5 * (self.cov + self.cov.T)
            w, V = linalg.eigh(cov)
            root = V * np.sqrt(np.clip(w, 0, None))  # cov = root @ root.T
            object.__setattr__(self, "cov", cov)
        object.__setattr__(self, "_root", root)

    # --- coefficient level -----------------------------------------------------------------
    @property
    def sd_coef(self) -> np.ndarray:
        """Posterior sd of each coefficient."""
        if self.draws is not None:
            return self.draws.std(axis=0, ddof=1)
        return np.sqrt(np.clip(np.diag(self.cov), 0, None) * self._var_factor)

    @property
    def _var_factor(self) -> float:
        # Variance of a Student-t is scale^2 * df / (df - 2).
        if self.df is None:
            return 1.0
        return self.df / (self.df - 2) if self.df > 2 else np.inf

    def sample(self, n_draws, rng=None) -> np.ndarray:
        """Coefficient draws, shape (n_draws, n_coef): resampled draws or Gaussian draws."""
        rng = np.random.default_rng(rng)
        if self.draws is not None:
            return self.draws[rng.integers(0, len(self.draws), n_draws)]
        z = rng.standard_normal((n_draws, self._root.shape[1]))
        if self.df is not None:
            z = z * np.sqrt(self.df / rng.chisquare(self.df, (n_draws, 1)))
        return self.mean + z @ self._root.T

    # --- field level -----------------------------------------------------------------------
    def values(self, points) -> np.ndarray:
        """Posterior mean of the field at ``points``."""
        if self.draws is not None:
            return self.domain.field(self.draws.mean(axis=0), points)
        return self.domain.field(self.mean, points)

    def _repr_html_(self):
        from .report.notebook import estimate_html  # the view lives with the report

        return estimate_html(self)

    def at(self, points, level=0.9, *, predictive=False, block=8192) -> PointSummary:
        """Mean, sd and central ``level`` interval of the field at ``points``.

        Parameters
        ----------
        points : array_like of shape (n_points, dim)
        level : float, default=0.9
            Probability of the central interval.
        predictive : bool, default=False
            Include the noise of a new reading (``noise_sd``) in sd and interval.
        block : int, default=8192
            Points evaluated per block (bounds memory on large grids).
        """
        level = check_level(level, where="Estimate.at")
        points = np.asarray(points, dtype=float)
        return self._summarise(len(points), lambda sl: self.domain.design(points[sl]), level,
                               predictive, block)

    def linear(self, rows, level=0.9) -> PointSummary:
        r"""Mean, sd and central ``level`` interval of linear functionals :math:`H c`.

        Parameters
        ----------
        rows : array_like of shape (n_functionals, n_coef)
            One row :math:`h` per functional :math:`h^\top c` of the coefficients (a heat
            flow, a flux density at a rim point).
        level : float, default=0.9
        """
        level = check_level(level, where="Estimate.linear")
        H = np.atleast_2d(np.asarray(rows, dtype=float))
        return self._summarise(len(H), lambda sl: H[sl], level, False, 8192)

    def _summarise(self, n, rows_of, level, predictive, block) -> PointSummary:
        # Summaries of n functionals whose coefficient rows rows_of(slice) gives block by block.
        mean, sd = np.empty(n), np.empty(n)
        lower, upper = np.empty(n), np.empty(n)
        q = [(1 - level) / 2, (1 + level) / 2]
        noise = float(self.noise_sd or 0.0) if predictive else 0.0
        for start in range(0, n, block):
            sl = slice(start, start + block)
            H = rows_of(sl)
            if self.draws is not None:
                U = self.draws @ H.T
                if noise:
                    rng = np.random.default_rng(start)
                    U = U + noise * rng.standard_normal(U.shape)
                mean[sl] = U.mean(axis=0)
                sd[sl] = U.std(axis=0, ddof=1)
                lo, hi = np.quantile(U, q, axis=0)
                lower[sl], upper[sl] = lo, hi
            else:
                m = H @ self.mean
                # Row sums of (H R)^2 with cov = R R^T: one product of the mean's size times p.
                A = H @ self._root
                scale = np.sqrt(np.einsum("ij,ij->i", A, A) + noise**2)
                z = interval_z(level, self.df)
                mean[sl], sd[sl] = m, scale * np.sqrt(self._var_factor)
                lower[sl], upper[sl] = m - z * scale, m + z * scale
        return PointSummary(mean, sd, lower, upper, level)

    def polar_map(self, rho, n_angles, level=0.9) -> PointSummary:
        """Mean, sd and interval on rings at relative radii ``rho`` and equally spaced angles.

        Points are ``domain.polar_grid(rho, n_angles)`` (ring by ring). For a Gaussian result on
        a domain with ``ring_variance`` the exact variance costs one short FFT per ring
        (:mod:`invert.geometry.polar`); otherwise this is :meth:`at` on those points.
        """
        level = check_level(level, where="Estimate.polar_map")
        grid = getattr(self.domain, "polar_grid", None)
        if grid is None:
            raise ValueError(f"The domain {type(self.domain).__name__} has no polar grid.")
        pts = grid(rho, n_angles)
        ring = getattr(self.domain, "ring_variance", None)
        if self.draws is not None or ring is None:
            return self.at(pts, level)
        m = self.domain.field(self.mean, pts)
        scale = np.sqrt(np.clip(ring(self.cov, rho, n_angles), 0.0, None))
        z = interval_z(level, self.df)
        return PointSummary(m, scale * np.sqrt(self._var_factor), m - z * scale, m + z * scale,
                            level)

    def grid_map(self, x, y, level=0.9, *, predictive=False) -> PointSummary:
        r"""Mean, sd and central ``level`` interval on the tensor grid ``x`` by ``y``.

        Parameters
        ----------
        x, y : array_like of shape (n_x,), (n_y,)
            Grid axes, in the frame of the sensor points.
        level : float, default=0.9
        predictive : bool, default=False
            Include the noise of a new reading (``noise_sd``), as in :meth:`at`.

        Returns
        -------
        PointSummary
            Arrays of shape (n_y, n_x) (row ``j`` at ``y[j]``, as ``numpy.meshgrid``); NaN at
            points outside the region (relative radius above 1, or outside by the domain's
            ``contains`` when it has one).

        Notes
        -----
        For a Gaussian result on a domain with ``grid_moments`` (the disk:
        :mod:`invert.geometry.cartesian`) a grid symmetric about the centre shares one
        canonical point among up to eight mirror images, and the map costs about as much as
        the mean map; the numbers equal :meth:`at` to rounding. Otherwise (draws, other
        domains, grids without the symmetry) this is :meth:`at` on the inside points.
        """
        level = check_level(level, where="Estimate.grid_map")
        x, y = (np.asarray(a, dtype=float) for a in (x, y))
        if x.ndim != 1 or y.ndim != 1 or not (np.isfinite(x).all() and np.isfinite(y).all()):
            raise ValueError(f"The grid axes of Estimate.grid_map must be finite 1-D arrays. "
                             f"Got shapes {x.shape} and {y.shape}.")
        fast = getattr(self.domain, "grid_moments", None)
        got = None if self.draws is not None or fast is None else fast(
            self.mean, self._root, x, y)
        if got is None:
            X, Y = np.meshgrid(x, y)
            pts = np.column_stack([X.ravel(), Y.ravel()])
            contains = getattr(self.domain, "contains", None)
            inside = (self.domain.relative_radius(pts) <= 1.0 if contains is None
                      else contains(pts))
            s = self.at(pts[inside], level, predictive=predictive)
            out = []
            for a in (s.mean, s.sd, s.lower, s.upper):
                full = np.full(pts.shape[0], np.nan)
                full[inside] = a
                out.append(full.reshape(y.size, x.size))
            return PointSummary(*out, level)
        m, var, _ = got
        noise = float(self.noise_sd or 0.0) if predictive else 0.0
        scale = np.sqrt(var + noise**2) if noise else np.sqrt(var, out=var)
        z = interval_z(level, self.df)
        sd = scale if self.df is None else scale * np.sqrt(self._var_factor)
        upper = z * scale
        lower = m - upper
        upper += m
        return PointSummary(m, sd, lower, upper, level)

    def cov_at(self, points) -> np.ndarray:
        """Posterior covariance of the field between ``points``."""
        H = self.domain.design(points)
        if self.draws is not None:
            return np.atleast_2d(np.cov(self.draws @ H.T, rowvar=False))
        A = H @ self._root
        return A @ A.T * self._var_factor

    def boundary(self, n=360, level=0.9):
        """Rim profile on the domain's rim grid as a pandas DataFrame.

        Columns are the domain's grid columns (``theta_deg`` for a disk) followed by ``mean``,
        ``sd``, ``lower`` and ``upper``.
        """
        pts, cols = self.domain.rim_grid(n)
        return self.at(pts, level).to_frame(**cols)


def readings_from(data, domain):
    """Return ``data`` as :class:`~invert.io.readings.Readings`, converting a DataFrame.

    A DataFrame is read by :meth:`~invert.io.readings.Readings.from_frame` with the domain's
    dimension and centre; Readings are returned as they are.
    """
    if hasattr(data, "check_domain"):
        return data
    if not hasattr(data, "columns"):
        raise TypeError(f"readings must be Readings or a pandas DataFrame, got "
                        f"{type(data).__name__}")
    from .io.readings import Readings  # the one table reader (io layer), needed only here

    return Readings.from_frame(data, dim=domain.dim, center=domain.center)
