"""Scan registration: point-to-line ICP with a coarse global stage and a covariance.

Given two 2D scans, each as (N, 2) points in its own sensor frame (metres),
find the pose ``T = [x, y, theta]`` of the source scan in the target scan's
frame, so that ``target ≈ T · source``.  For a target scan A taken at pose a
and a source scan B taken at pose b, ``T`` estimates ``a^-1 ∘ b``
(docs/formats.md, "Python API").

Stages
------
1. Per-scan preparation (:func:`prepare_scan`, done once per scan and reused
   for every pair it takes part in): a local line fitted to each point's
   neighbourhood (centroid, normal facing the sensor, thickness; by default
   with a quadratic term so that curved surfaces are followed, not replaced
   by chords), each reading's influence on those fits (for the covariance),
   a kd-tree over the points that lie on such lines, an evenly spread subset
   and the likelihood grid of closurecheck/coarse.py.
2. Optional coarse stage (Olson 2009 correlative matching) around each seed
   guess, keeping the best few distinct hypotheses.
3. Point-to-line ICP (A. Censi, "An ICP variant using a point-to-line
   metric", ICRA 2008) from each hypothesis: nearest line point by kd-tree;
   a match needs both points on lines, normals that agree (both face their
   sensors, so the two faces of a thin wall never match) and the source
   point inside the target line's support; residual = offset of the
   transformed source point from the target's local line, weighted by the
   inverse of its predicted variance and by a robust kernel
   (closurecheck/kernels.py) scaled by the median absolute deviation;
   damped Gauss-Newton steps on [x, y, theta], re-associating only after
   the pose has moved by ``reassociate_m``.  Point-to-point ICP
   (closed-form 2D Procrustes step) is available as an option.  The
   hypotheses are refined in turn, and one that comes within
   ``reassociate_m`` of a pose an earlier one converged to stops there and
   takes that pose (:func:`_reached_found`); one still moving after
   ``_RIVAL_PROBE_ITERATIONS`` with a fit well below a converged one's stops
   as a rival.
4. The refined hypotheses are ranked by a point-distance fit score; the
   best is returned with its covariance (closurecheck/covariance.py: the
   Censi closed form by default) and the gap to the best distinct
   competitor.

Noise model: each reading has Gaussian range noise along its beam (the beam
direction is the point's direction from the sensor, the origin of its scan
frame), or isotropic point noise (``point_noise="isotropic"``); sigma is
estimated from the residuals.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field, fields, replace

import numpy as np
from scipy.spatial import cKDTree

from ..core import se2
from ..core.kernels import KERNEL_CHOICES, kernel_from_name
from ..core.options import fail, options, setting
from ..core.stats import chi2_threshold
from ..errors import InputError
from . import _kernels
from . import correlative as _coarse
from . import covariance as _cov

# Consistent-scale factor of the median absolute deviation for Gaussian data
# (1 / Phi^-1(3/4)); standard robust-statistics constant.
_MAD_TO_SIGMA = 1.482602218505602


@options
class RegistrationOptions:
    """Settings of scan preparation and registration (SI units, names carry them).

    Line features (used by :func:`prepare_scan`)
        line_neighbours: neighbours (including the point) used to fit each
            local line.
        line_radius_m: neighbours farther than this are not used.
        min_line_points: fewer neighbours than this give no line.
        max_line_thickness: largest ratio of the neighbourhood's spread
            across the line to its spread along it (square root of the
            eigenvalue ratio); thicker neighbourhoods (corners, clutter,
            curved objects) give no line.
        line_model: ``"quadratic"`` fits the offset across each local line
            as a parabola along it, so curved surfaces are followed rather
            than replaced by chords; ``"line"`` uses the straight line.
        point_noise: ``"range"`` (noise along each beam) or ``"isotropic"``.
        min_incidence_cos: floor on |cos| of the angle between a beam and the
            line normal in the noise model, so that grazing readings are not
            trusted more than this (common practice).

    Correspondences and solver
        method: ``"point_to_line"`` or ``"point_to_point"``.
        max_correspondence_m: pairs farther apart are not matched.
        max_normal_angle_rad: pairs whose normals (both facing their sensors)
            differ by more are not matched; rejects the far side of a thin
            wall.  Source points without a line are then not matched either;
            a value >= pi switches the check off and matches every point.
        max_extrapolation_m: a source point must fall within the target
            line's support (the extent of the readings that fitted it) plus
            this margin, measured along the line.
        kernel: robust kernel name (closurecheck.core.kernels), e.g. ``"huber"``,
            ``"cauchy"``, ``"l2"``.
        kernel_scale: kernel threshold in robust standard deviations
            (1.345 gives Huber's estimator 95% efficiency on Gaussian data).
        min_noise_m: floor on the robust residual scale (metres).
        max_iterations, tolerance_m, tolerance_rad: Gauss-Newton stops when
            a step moves less than both tolerances.
        reassociate_m: correspondences are searched again only after the
            pose has moved some source point by this much since the last
            search.
        damping: Levenberg-Marquardt damping as a fraction of the Hessian's
            mean eigenvalue in scaled coordinates; keeps steps along an
            unconstrained direction small.
        inlier_sigmas: a correspondence is an inlier when its normalised
            residual is within this many robust standard deviations.
        fit_sigma_m: distance scale of the fit score used to rank hypotheses.
        point_features: small isolated objects (a post, a bollard: no point
            of their neighbourhood lies on a line, :func:`_point_like`) are
            registered too: seen by at least ``min_line_points`` readings
            they take the local model of a line (its quadratic term follows
            their round outline), seen by fewer they are matched point to
            segment (:func:`_point_rows`).  Without them a scene of posts
            has almost nothing to register on.  On by default since
            verification sets aside a consistent set the odometry does not
            support (``verify.clique_max_odometry_factor``): before that
            rule, on the warehouse route at 50 deg/100 m of heading drift,
            it tipped verification into a family of look-alike closures
            (391 false of 611 accepted, docs/performance.md, robustness
            section).

    Covariance
        covariance: ``"censi"`` (Censi 2007 closed form, accounts for shared
            target lines) or ``"hessian"`` (sigma^2 H^-1).
        degeneracy_threshold: smallest/largest Hessian eigenvalue ratio
            below which a direction counts as unconstrained.
        unobservable_sigma_m: standard deviation added along unconstrained
            directions (metres; theta scaled by the scan's length scale).
            ICP leaves the estimate near its start there (the guess or the
            coarse hypothesis), so this should exceed that start's error.

    Coarse stage (Olson 2009)
        coarse: run the coarse search around each seed before ICP.
        coarse_window_m, coarse_window_rad: half-widths of the search window
            around a seed (x and y in metres, theta in radians).
        coarse_resolution_m: likelihood grid cell size.
        coarse_sigma_m: blur of the likelihood grid.
        coarse_block_cells: edge (cells, rounded up to a power of two) of the
            largest block of the branch-and-bound pyramid.
        coarse_angle_step_rad: rotation step; 0 chooses one cell of motion
            at the 90th-percentile range.
        coarse_max_points: source points used by the coarse search.
        hypotheses: distinct coarse hypotheses refined by ICP (one that
            reaches, within ``reassociate_m``, the pose an earlier one
            converged to stops there; one still moving after 12 iterations
            with a fit score below 0.8 of a converged one's stops as a
            rival).
        hypothesis_separation_m, hypothesis_separation_rad: two poses closer
            than both count as the same hypothesis, unless the winner's
            covariance rules the other out (``rival_probability``).
        rival_probability: a converged hypothesis whose offset from the
            winner lies beyond this chi-square(3) bound of the winner's
            covariance is a distinct alternative even inside the separation:
            the covariance claims the registration could not have ended there.
    """

    line_neighbours: int = setting(16, at_least=3)
    line_radius_m: float = setting(0.3, above=0.0)
    min_line_points: int = setting(5, at_least=3)
    max_line_thickness: float = setting(0.3, above=0.0)
    line_model: str = setting("quadratic", choices=("quadratic", "line"))
    point_noise: str = setting("range", choices=("range", "isotropic"))
    min_incidence_cos: float = setting(0.2, above=0.0, at_most=1.0)

    method: str = setting("point_to_line", choices=("point_to_line", "point_to_point"))
    max_correspondence_m: float = setting(0.5, above=0.0)
    max_normal_angle_rad: float = setting(1.0, above=0.0)
    max_extrapolation_m: float = setting(0.0, at_least=0.0)
    kernel: str = setting("huber", choices=KERNEL_CHOICES)
    kernel_scale: float = setting(1.345, above=0.0)
    min_noise_m: float = setting(0.001, above=0.0)
    point_features: bool = setting(True)
    max_iterations: int = setting(30, at_least=1)
    tolerance_m: float = setting(1e-4, above=0.0)
    tolerance_rad: float = setting(2e-5, above=0.0)
    reassociate_m: float = setting(0.01, above=0.0)
    damping: float = setting(1e-3, at_least=0.0)
    inlier_sigmas: float = setting(3.0, above=0.0)
    fit_sigma_m: float = setting(0.1, above=0.0)

    covariance: str = setting("censi", choices=("censi", "hessian"))
    degeneracy_threshold: float = setting(0.01, at_least=0.0)
    unobservable_sigma_m: float = setting(5.0, above=0.0)

    coarse: bool = setting(True)
    coarse_window_m: float = setting(3.5, at_least=0.0)
    coarse_window_rad: float = setting(0.85, at_least=0.0)
    coarse_resolution_m: float = setting(0.1, above=0.0)
    coarse_sigma_m: float = setting(0.1, above=0.0)
    coarse_block_cells: int = setting(16, at_least=1)
    coarse_angle_step_rad: float = setting(0.0, at_least=0.0)
    coarse_max_points: int = setting(160, at_least=3)
    hypotheses: int = setting(3, at_least=1)
    hypothesis_separation_m: float = setting(0.5, above=0.0)
    hypothesis_separation_rad: float = setting(0.15, above=0.0)
    rival_probability: float = setting(0.999, above=0.0, below=1.0)

    def __post_init__(self):
        if self.min_line_points > self.line_neighbours:
            fail("min_line_points", f"must not exceed line_neighbours ({self.line_neighbours})")

    def preparation_key(self) -> tuple:
        """The settings that shape a :class:`PreparedScan` (scans must agree on them)."""
        return (self.line_neighbours, self.line_radius_m, self.min_line_points, self.max_line_thickness,
                self.line_model,
                self.point_noise, self.min_incidence_cos, self.coarse_resolution_m, self.coarse_sigma_m,
                self.coarse_block_cells, self.coarse_max_points, self.point_features)


DEFAULT_OPTIONS = RegistrationOptions()


@dataclass(frozen=True, eq=False)
class PreparedScan:
    """Per-scan data built once by :func:`prepare_scan` and reused for every pair.

    All coordinates are metres in the scan's own sensor frame.  What a scan
    needs as the source of a pair is built at once; what it needs only as a
    target (the local line models, their kd-tree, the covariance's
    sensitivities and the coarse grid) is built on first use and kept, so
    that a scan that is only ever a source, as in a single :func:`register`
    call, does not pay for it.  The values are the same either way.

    Attributes
    ----------
    points : (N, 2) the scan's points.
    beams : (N, 2) unit direction from the sensor to each point.
    normals : (N, 2) unit normal of the local line, facing the sensor; zero
        where there is no line.
    thickness : (N,) spread across / along the local line (0 = perfectly
        straight, 1 = no direction); NaN where too few neighbours.
    has_line : (N,) bool, the point lies on locally straight structure or on
        the outline of a small object seen by ``min_line_points`` readings or more.
    line_index : (M,) indices of the points with a line.
    point_index : (P,) indices of the points of small isolated objects seen by fewer
        than ``min_line_points`` readings, matched point to segment
        (:func:`_point_like`; empty when ``point_features`` is off).
    point_object : (P,) label of the object (connected neighbours) each belongs to.
    length_m : root-mean-square range of the points (metres).
    radius_m : largest range of the points (metres).
    point_noise : the noise model the line coefficients were built for.
    key : the preparation settings (RegistrationOptions.preparation_key()).

    Built on first use (properties):

    coarse_points : (K, 2) downsampled points for the coarse search and the
        fit score (one per cell of twice the coarse resolution).
    tree : cKDTree over ``points[line_index]``.
    line : (M, 14) per line point: centroid x, y, normal x, y, the local
        model's coefficients b0, b1, b2 (offset across the line at along-line
        position s is ``b0 + b1 s + b2 s^2`` within the readings' extent and
        continues along the tangent beyond it), the six entries
        Q00, Q01, Q02, Q11, Q12, Q22 of its variance ``sigma^2 phi Q phi^T``
        and the extent e (m).
    nbr_index : (M, k) int32 indices into ``points`` of the readings that
        fitted each line; nbr_coef : (M, k, 3) float32, each reading's
        influence on the fitted coefficients (b0, b1, b2) per unit of its
        range noise (zero for unused slots); float32 halves the memory of
        these, the largest arrays of a prepared scan, at no cost to the
        covariance's precision.
    grid : the likelihood grid (closurecheck.registration.correlative.LikelihoodGrid).
    point_tree : cKDTree over ``points[point_index]`` (None when there are none).
    fit_tree : cKDTree over the points with a line or of a small object (the fit score's targets).
    """

    points: np.ndarray
    beams: np.ndarray
    normals: np.ndarray
    thickness: np.ndarray
    has_line: np.ndarray
    line_index: np.ndarray
    point_index: np.ndarray
    point_object: np.ndarray
    length_m: float
    radius_m: float
    point_noise: str
    key: tuple
    # Built on first use: "fit" holds the neighbourhoods the target side is
    # built from (dropped once it is), "target" the built (line points, line,
    # nbr_index, nbr_coef, cell index), "tree" the kd-tree over the line
    # points, "grid" the likelihood grid.
    _lazy: dict = field(repr=False)

    def __len__(self) -> int:
        return len(self.points)

    def _target_side(self):
        got = self._lazy.get("target")
        if got is None:
            fit = self._lazy.get("fit")
            if fit is None:
                # Another thread (a Dask worker runs batches in threads) built it and dropped "fit"
                # in between; it stores "target" before dropping "fit".
                return self._lazy["target"]
            got = _target_side(self, *fit)
            self._lazy["target"] = got
            self._lazy.pop("fit", None)
        return got

    @property
    def tree(self) -> cKDTree:
        got = self._lazy.get("tree")
        if got is None:
            # Built on first use: ICP's and the fit score's queries go to the compiled cell index
            # (only duplicate points at the nearest distance ask the tree), so a single register
            # call never needs it (0.1 ms per scan).
            got = cKDTree(self._target_side()[0])
            self._lazy["tree"] = got
        return got

    @property
    def line(self) -> np.ndarray:
        return self._target_side()[1]

    @property
    def nbr_index(self) -> np.ndarray:
        return self._target_side()[2]

    @property
    def nbr_coef(self) -> np.ndarray:
        return self._target_side()[3]

    @property
    def point_tree(self) -> cKDTree | None:
        if "point_tree" not in self._lazy:
            self._lazy["point_tree"] = cKDTree(self.points[self.point_index]) if len(self.point_index) else None
        return self._lazy["point_tree"]

    def _point_cells(self):
        """The small-object readings (m, 2) and their cell index (_kernels.cell_index), for ICP's queries."""
        got = self._lazy.get("point_cells")
        if got is None:
            pp = np.ascontiguousarray(self.points[self.point_index])
            got = (pp, *_kernels.cell_index(pp, _CELL_M))
            self._lazy["point_cells"] = got
        return got

    def _fit_index(self) -> np.ndarray:
        """Indices of the points with a line or of a small object, ascending: np.union1d(line_index, point_index).

        A mask instead of union1d's sort of the two (15 of a sparse scan's 100 µs of fit score).
        """
        mask = self.has_line.copy()
        mask[self.point_index] = True
        return np.flatnonzero(mask)

    @property
    def fit_tree(self) -> cKDTree:
        got = self._lazy.get("fit_tree")
        if got is None:
            got = self.tree if not len(self.point_index) else cKDTree(self.points[self._fit_index()])
            self._lazy["fit_tree"] = got
        return got

    @property
    def coarse_points(self) -> np.ndarray:
        got = self._lazy.get("coarse_points")
        if got is None:
            cell, most = self._lazy["coarse_settings"]
            got = _coarse.downsample(self.points, cell, most)
            self._lazy["coarse_points"] = got
        return got

    @property
    def grid(self) -> _coarse.LikelihoodGrid:
        got = self._lazy.get("grid")
        if got is None:
            res, sigma, block = self._lazy["grid_settings"]
            got = _coarse.build_grid(self.points, res, sigma, block)
            self._lazy["grid"] = got
        return got

    def drop_grid(self) -> bool:
        """Forget the coarse grid (the largest part once built); True if there was one.

        The next use of :attr:`grid` builds it again, with the same bits
        (runners.work.ScanCache keeps grids for its most recent scans only).

        Examples
        --------
        >>> from closurecheck.registration.icp import RegistrationOptions, prepare_scan
        >>> from closurecheck.registration.warm import room_scan
        >>> scan = prepare_scan(room_scan((0.0, 0.0, 0.0)), RegistrationOptions())
        >>> _ = scan.grid
        >>> scan.drop_grid(), scan.drop_grid()
        (True, False)
        """
        return self._lazy.pop("grid", None) is not None


@dataclass(frozen=True, eq=False)
class Registration:
    """Result of registering a source scan to a target scan.

    Attributes
    ----------
    delta : (3,) pose [x, y, theta] of the source in the target frame
        (``target ≈ delta · source``; ``a^-1 ∘ b`` for target at a, source at b).
    covariance : (3, 3) covariance of ``delta`` on (x, y, theta) in the
        target frame (m^2, m rad, rad^2).
    rmse : root-mean-square point-to-line residual of the inliers (metres).
    overlap : fraction of source points with an accepted correspondence.
    converged : the final ICP stopped on its step tolerance.
    iterations : ICP iterations of the returned hypothesis.
    inlier_fraction : fraction of accepted correspondences within
        ``inlier_sigmas`` robust standard deviations.
    correspondences : number of accepted correspondences.
    sigma_m : estimated range-noise standard deviation (metres).
    eigenvalues : (3,) ascending per-correspondence Hessian eigenvalues in
        scaled coordinates (x, y, L theta); see covariance.py.
    weakest_direction : (3,) unit eigenvector of the smallest eigenvalue, in
        scaled coordinates (x, y, L theta).
    degeneracy : smallest / largest eigenvalue (0 = a direction is unconstrained).
    degenerate : the covariance was inflated along an unconstrained direction.
    fit_score : fraction of source points explained by the target: the mean
        over all source points of ``exp(-d^2 / (2 fit_sigma_m^2))``, d the
        distance to the nearest target point; used to rank hypotheses.
    second_fit_score : fit score of the best distinct competing hypothesis
        (0 when every hypothesis converged to the winner; NaN when only one
        hypothesis was tried).  Distinct: outside the separation box
        (``hypothesis_separation_m``, ``hypothesis_separation_rad``), or
        converged outside the chi-square bound of ``covariance`` at
        ``rival_probability``.
    score_gap : ``fit_score - second_fit_score`` (NaN when only one hypothesis).
    ambiguity : ``second_fit_score / fit_score`` in [0, 1]; near 1 means a
        look-alike alternative fits about as well (NaN when only one hypothesis).
    coarse_ran : the coarse stage was run.
    coarse_score : best coarse grid score in [0, 1] (NaN when it did not run).
    coarse_second_score : best coarse score of a distinct hypothesis (NaN if none).
    hypotheses : number of hypotheses refined by ICP.
    """

    delta: np.ndarray
    covariance: np.ndarray
    rmse: float
    overlap: float
    converged: bool
    iterations: int
    inlier_fraction: float
    correspondences: int
    sigma_m: float
    eigenvalues: np.ndarray
    weakest_direction: np.ndarray
    degeneracy: float
    degenerate: bool
    fit_score: float
    second_fit_score: float
    score_gap: float
    ambiguity: float
    coarse_ran: bool
    coarse_score: float
    coarse_second_score: float
    hypotheses: int

    @property
    def information(self) -> np.ndarray:
        """Inverse of :attr:`covariance` (3, 3)."""
        return np.linalg.inv(self.covariance)


# --------------------------------------------------------------------------- input checks


def _as_points(points, name: str) -> np.ndarray:
    try:
        p = np.asarray(points, dtype=np.float64)
    except (TypeError, ValueError):
        raise InputError(f"{name} must be an (N, 2) array of numbers") from None
    if p.ndim != 2 or p.shape[1] != 2:
        raise InputError(f"{name} must have shape (N, 2), got {p.shape}")
    if len(p) < 3:
        raise InputError(f"{name} needs at least 3 points, got {len(p)}")
    # Compiled (_kernels.all_finite): np.isfinite(p).all() allocates a mask and reduces it, 1.4 µs for
    # a 180-point scan against 0.5 µs.
    if not _kernels.all_finite(p):
        raise InputError(f"{name} contains NaN or infinite coordinates")
    return p


def _as_seeds(guess) -> np.ndarray:
    try:
        g = np.asarray(guess, dtype=np.float64)
    except (TypeError, ValueError):
        raise InputError("guess must be [x, y, theta] or a (K, 3) array of them") from None
    if g.ndim == 1:
        g = g[None, :]
    if g.ndim != 2 or g.shape[1] != 3 or len(g) == 0:
        raise InputError(f"guess must have shape (3,) or (K, 3) with K >= 1, got {np.shape(guess)}")
    if not np.isfinite(g).all():
        raise InputError("guess contains NaN or infinite values")
    return g


def _as_guess_covariance(cov) -> np.ndarray | None:
    """A caller's guess covariance as a checked (3, 3) array, or None."""
    if cov is None:
        return None
    try:
        c = np.asarray(cov, dtype=np.float64)
    except (TypeError, ValueError):
        raise InputError("guess_covariance must be a (3, 3) array of numbers") from None
    if c.shape != (3, 3):
        raise InputError(f"guess_covariance must have shape (3, 3) on (x, y, theta), got {c.shape}")
    if not np.isfinite(c).all():
        raise InputError("guess_covariance contains NaN or infinite values")
    if not np.allclose(c, c.T, rtol=1e-9, atol=1e-12 * max(float(np.abs(c).max()), 1e-300)):
        raise InputError("guess_covariance must be symmetric")
    if np.diag(c).min() < 0 or np.linalg.eigvalsh(c).min() < -1e-9 * max(float(np.abs(c).max()), 1e-300):
        raise InputError("guess_covariance must be positive semi-definite (variances m^2, rad^2)")
    return c


# Probability of the guess's confidence ellipsoid whose bounding box is the
# coarse window of a caller's guess covariance: 99.9% (about 4 sigma per axis
# with three degrees of freedom), so that the true pose lies inside for all
# but one guess in a thousand when the covariance is honest.
GUESS_WINDOW_PROBABILITY = 0.999


def coarse_window(guess_covariance, options: RegistrationOptions, angle_step_rad: float) -> tuple[float, float]:
    """Half-widths (metres, radians) of the coarse search around a guess with this covariance.

    The window is the bounding box of the guess's 99.9% confidence
    ellipsoid (``sqrt(chi2_threshold(0.999, 3) * C_ii)`` per axis; x and y
    share the larger half-width), floored at two grid cells and two angle
    steps so that the search still compares neighbours of the guess, and
    capped at ``options.coarse_window_m`` / ``coarse_window_rad`` (the wide
    default).  ``guess_covariance=None`` gives the cap.

    Examples
    --------
    A guess good to 5 cm and 1 degree (one sigma) gets a window of a few
    tens of centimetres and a few degrees; a vague one gets the default:

    >>> import numpy as np
    >>> from closurecheck.registration.icp import DEFAULT_OPTIONS, coarse_window
    >>> m, rad = coarse_window(np.diag([0.05 ** 2, 0.05 ** 2, np.radians(1.0) ** 2]), DEFAULT_OPTIONS, 0.01)
    >>> round(m, 3), round(float(np.degrees(rad)), 2)
    (0.202, 4.03)
    >>> coarse_window(np.diag([4.0, 4.0, 1.0]), DEFAULT_OPTIONS, 0.01) == (3.5, 0.85)
    True
    """
    cap_m, cap_rad = options.coarse_window_m, options.coarse_window_rad
    if guess_covariance is None:
        return cap_m, cap_rad
    # Imported here: scipy.stats takes about 0.4 s to import and registration otherwise needs
    # only scipy.spatial, which matters to a caller who registers one pair.
    from ..core.stats import chi2_threshold

    c = chi2_threshold(GUESS_WINDOW_PROBABILITY, dof=3)
    var = np.clip(np.diag(guess_covariance), 0.0, None)
    half_m = float(np.sqrt(c * max(var[0], var[1])))
    half_rad = float(np.sqrt(c * var[2]))
    window_m = min(max(half_m, 2.0 * options.coarse_resolution_m), cap_m)
    window_rad = min(max(half_rad, 2.0 * angle_step_rad), cap_rad)
    return window_m, window_rad


# --------------------------------------------------------------------------- preparation


def _line_features(points, opt: RegistrationOptions):
    """Fit a line to each point's neighbourhood (neighbours and sums compiled: registration/_kernels.py).

    The neighbourhood of a point is its ``line_neighbours`` nearest points
    within ``line_radius_m`` (itself included); the line is the principal
    axis of their scatter, its normal turned to face the sensor (the frame
    origin), so that two scans seeing opposite faces of a thin wall have
    opposite normals.  Thickness is sqrt(smallest / largest eigenvalue).
    """
    n = len(points)
    k = min(opt.line_neighbours, n)
    # The neighbourhoods and their sums in one compiled call (see _point_like for the figure).
    idx, tied, any_tied, *sums = _kernels.neighbourhood_sums(points, k, opt.line_radius_m)
    if any_tied:
        # Equal distances (quantised ranges): the kd-tree's order of them, as before the kernel.
        _, ref = cKDTree(points).query(points[tied], k=k, distance_upper_bound=opt.line_radius_m)
        idx[tied] = ref.reshape(-1, k)
        sums = _kernels.scatter(points, idx)
    count, cx, cy, sxx, syy, sxy, diff, two_sxy, rad = sums
    # Closed-form eigen-decomposition of the 2x2 scatter matrix: the angle, its sin and cos in numpy
    # (the compiled ones differ from them in the last bit now and then, and results are kept to the
    # bit), their arguments and the radius (the C library's hypot, as numpy's) with the sums
    # (_kernels.scatter), the rest in one compiled pass (_kernels.line_frames).
    phi = 0.5 * np.arctan2(two_sxy, diff)
    used, normal, centroid, tangent, thickness, has_line = _kernels.line_frames(
        idx, count, cx, cy, sxx, syy, rad, np.sin(phi), np.cos(phi), opt.min_line_points, opt.max_line_thickness)
    return idx, used, count, centroid, normal, tangent, thickness, has_line


def _point_like(points, idx, used, has_line, opt: RegistrationOptions):
    """Points of small isolated objects: (indices, object label of each).

    A point qualifies when it has no line, at least two neighbours within
    ``line_radius_m``, none of its neighbours has a line either, and the
    object its neighbours chain into spans at most ``2 line_radius_m``:
    a compact object with no straight part (a lamp post, a bollard, a
    column), not the corner of a wall, whose neighbours lie on the walls'
    lines, nor a wall far off at a grazing angle.  The round cross-section of a post gives a
    neighbourhood too thick for a line (spread ratio 0.33-0.37 on the
    0.3 m posts of the ``lot`` scene, against a limit of 0.3), so before
    these points were matched a scene of posts registered on the few
    straight faces in range alone and most of its true pairs came out
    degenerate or unconverged (docs/performance.md, robustness section).
    """
    if not opt.point_features:
        return np.zeros(0, np.int64), np.zeros(0, np.int64)
    # Objects: connected groups of neighbours among all the scan's points; a segment of
    # _associate_points never joins two of them.  Only small objects: a long group is a wall (near the sensor its
    # dense noisy readings are too thick for lines at places, far off too sparse), whose readings
    # slide along it with the viewpoint; matched point-to-point they would pin a bare corridor along
    # its axis (tests/registration/test_covariance.py).  Compiled (_kernels.components): the same
    # labels as scipy's connected_components on the neighbour graph, without building a sparse
    # matrix (0.42 -> 0.03 ms per 721-point scan); the candidates, the groups and the selection in
    # one call (_kernels.small_objects; with _kernels.neighbourhood_sums, _prepare 80.8 -> 77.4 µs a
    # hall scan and 46.0 -> 42.4 µs a lot scan, medians of 60 interleaved rounds).
    return _kernels.small_objects(points, idx, used, has_line, 3, 2.0 * opt.line_radius_m)


def prepare_scan(points_xy, options: RegistrationOptions = DEFAULT_OPTIONS, *, grid: bool = True) -> PreparedScan:
    """Build the per-scan data that registration reuses across pairs.

    Parameters
    ----------
    points_xy : (N, 2) points of one scan in its sensor frame (metres; the
        sensor at the origin), N >= 3, all finite.
    options : preparation settings (line fitting, noise model, coarse grid).
    grid : also build the target side now (line models, cell index and the
        coarse stage's likelihood grid); otherwise each is built the first
        time the scan is the target of a pair (0.14 ms for the lines and
        0.10 ms for the grid of a 721-point office scan of
        benchmarks/registration.py), with the same values.

    Raises InputError on bad points or when no point lies on straight
    structure (nothing to register against).

    Examples
    --------
    >>> import closurecheck
    >>> from closurecheck.registration.icp import prepare_scan
    >>> log = closurecheck.simulate_log("ring", seed=4, scans=30)
    >>> scan = prepare_scan(log.points(10))
    >>> scan.points.shape == (len(scan), 2), scan.line.shape[1], bool(scan.has_line.mean() > 0.5)
    (True, 14, True)
    """
    pts = _as_points(points_xy, "points_xy")
    return _prepare(pts, options, grid)


def _prepare(pts, opt: RegistrationOptions, with_grid: bool) -> PreparedScan:
    idx, used, count, centroid, normal, tangent, thickness, has_line = _line_features(pts, opt)
    point_index, point_object = _point_like(pts, idx, used, has_line, opt)
    # A small object seen by enough readings for a line takes the local model of a line: the
    # quadratic model follows its outline (point-to-curve); the rest are matched to segments.  That,
    # the beams, the line points, their normals and the ranges' root-mean-square and maximum in one
    # compiled pass (_kernels.scan_arrays, the numpy steps' values): about fifteen numpy calls on
    # (N,) arrays before; with _kernels.small_objects, register(..., coarse=False) 0.64 -> 0.60 ms
    # a hall pair and 0.48 -> 0.45 ms a lot pair (benchmarks/registration_scenes.py pairs, medians).
    beams, normals, has_line, line_index, point_index, point_object, length_m, radius_m = _kernels.scan_arrays(
        pts, normal, has_line, count, point_index, point_object, opt.min_line_points)
    if len(line_index) < 3 and len(point_index) < 3:
        raise InputError("scan has fewer than 3 points on straight structure or small objects; cannot register it")
    # Rows of the line points are taken when the target side is built (PreparedScan._target_side),
    # and the coarse points when first asked for: a scan that is only ever a source, or a single
    # register call's target with the coarse stage off, never needs them (0.04 and 0.05 ms a
    # 721-point scan, about 4% of register(..., coarse=False); benchmarks/registration.py).
    fit = (idx, used, normal, tangent, centroid, line_index, opt)
    scan = PreparedScan(
        points=pts, beams=beams, normals=normals, thickness=thickness, has_line=has_line,
        line_index=line_index, point_index=point_index, point_object=point_object,
        length_m=length_m, radius_m=radius_m, point_noise=opt.point_noise,
        key=opt.preparation_key(),
        _lazy={"fit": fit, "grid_settings": (opt.coarse_resolution_m, opt.coarse_sigma_m, opt.coarse_block_cells),
               "coarse_settings": (2.0 * opt.coarse_resolution_m, opt.coarse_max_points)},
    )
    if with_grid:
        scan.grid  # noqa: B018 -- built now, as asked
        scan.line  # noqa: B018
    return scan


def _target_side(scan: PreparedScan, idx, used, normal, tangent, centroid, rows, opt: RegistrationOptions):
    """Line points, line models and reading sensitivities of a scan's line points (its role as a target).

    ``idx, used, normal, tangent, centroid`` are :func:`_line_features`' arrays over all the scan's
    points and ``rows`` the line points among them (``scan.line_index``).
    """
    # Local model h = f(a) fitted by least squares, a the offset of a neighbour along the line
    # and h across it: a straight line
    # [1, a] or, by default, a parabola [1, a, a^2] so that a curved surface
    # (a round column) is not replaced by its chord.  Beyond the readings'
    # extent e = max |a| the parabola continues along its tangent, never
    # extrapolating a noisy curvature: with m = clip(s, -e, e) the basis is
    # phi(s) = [1, s, 2 m s - m^2].  wts[l] = (X^T X)^-1 x_l gives
    # f(s) = sum_l h_l (wts_l . phi(s)), the fit's linear dependence on each
    # reading, which the covariance needs.
    # The offsets, the least-squares solve and products per line in one compiled call
    # (_kernels.line_models, which also takes the line points' rows of the arrays): 1.05 -> 0.38 ms a
    # scan on the 5,000-scan warehouse log against batched numpy products and 3 x 3 inverses, whose
    # BLAS and LAPACK orders of additions the loops do not reproduce (the last bits differ); then
    # 0.25 -> 0.13 ms a 721-point scan of benchmarks/registration.py against two kernels with
    # (M, k, 3) arrays in between and the rows gathered in numpy.
    lp, line, nbr, sens = _kernels.line_models(scan.points, scan.beams, idx, used, normal, tangent, centroid, rows,
                                               opt.line_model == "quadratic", opt.point_noise == "range",
                                               opt.min_incidence_cos)
    # The compiled cell index answers ICP's nearest-line queries in about a twentieth of the
    # kd-tree's time (0.02 against 0.5 ms for 600 queries); the kd-tree (PreparedScan.tree) is
    # built from lp only when something asks for it.
    return lp, line, nbr, sens, (lp, *_kernels.cell_index(lp, _CELL_M))


# Cell width (metres) of a target's nearest-line index: about half the correspondence distance, so
# that a query visits a 5 x 5 block of small cells (narrower cells only add empty ones).
_CELL_M = 0.25


def _nearest_line(tgt: PreparedScan, queries, upper_m: float):
    """(distances, indices) of the nearest line point of ``tgt`` to each (Q, 2) query closer than ``upper_m``.

    As ``tgt.tree.query(queries, distance_upper_bound=upper_m)``: inf and
    ``len(tgt.line_index)`` where there is none.
    """
    q = np.ascontiguousarray(queries)
    d, j, tied = _kernels.nearest(*tgt._target_side()[4], q, upper_m)
    if tied.any():
        # Two line points at exactly the nearest distance (duplicates): the kd-tree's pick, as before.
        d[tied], j[tied] = tgt.tree.query(q[tied], distance_upper_bound=upper_m)
    return d, j


# --------------------------------------------------------------------------- ICP


@dataclass(frozen=True, eq=False)
class _Solution:
    x: np.ndarray
    converged: bool
    iterations: int
    # Correspondence data at the final pose (point-to-line), for the figures.
    src: np.ndarray       # (n,) source point indices
    tgt: np.ndarray       # (n,) line indices into the target's line arrays
    r: np.ndarray         # (n,) residuals (m)
    v: np.ndarray         # (n,) residual variance units
    w: np.ndarray         # (n,) robust weights
    jac: np.ndarray       # (n, 3)
    s_along: np.ndarray   # (n, 2) along-line offsets s (m) and the basis phi_2(s) (m^2)
    src_coef: np.ndarray  # (n,) source-noise sensitivity
    scale: float          # robust residual scale (m)
    points: _PointRows | None = None   # point-to-point rows of small objects (_point_rows), if any
    merged: int = -1      # index of the found pose this hypothesis reached (_reached_found), else -1


@dataclass(frozen=True, eq=False)
class _PointRows:
    """Point-to-segment residuals of small-object points: one row per source point matched."""

    src: np.ndarray       # (m,) source point indices
    tgt: np.ndarray       # (m, 2) the two target readings spanning the segment (indices into target.points)
    r: np.ndarray         # (m,) residuals (m)
    v: np.ndarray         # (m,) residual variance units (sigma^2)
    w: np.ndarray         # (m,) robust weights
    jac: np.ndarray       # (m, 3)
    src_coef: np.ndarray  # (m,) sensitivity to the source reading's noise
    tgt_coef: np.ndarray  # (m, 2) sensitivity to the two target readings' noise


def _associate_points(src: PreparedScan, tgt: PreparedScan, x, opt):
    """Small-object matches under pose x: (source indices, (m, 2) target segment ends, transformed points).

    Each source point is matched to the segment between its nearest
    small-object target reading and the next nearest of the same object,
    and kept only where it projects onto that segment: a point beyond the
    ends of what the target saw of the object has no partner.
    """
    if not len(src.point_index) or tgt.point_tree is None or len(tgt.point_index) < 2:
        return None
    c, s = np.cos(x[2]), np.sin(x[2])
    pw = src.points[src.point_index] @ np.array([[c, s], [-s, c]]) + x[:2]
    k = min(3, len(tgt.point_index))
    _, j = tgt.point_tree.query(pw, k=k, distance_upper_bound=opt.max_correspondence_m)
    m = len(tgt.point_index)
    first = j[:, 0]
    ok = first < m
    label = np.append(tgt.point_object, -1)
    # The nearer of the next candidates that lies on the same object.
    second = np.full(len(first), m)
    for col in range(k - 1, 0, -1):
        same = (j[:, col] < m) & (label[j[:, col]] == label[np.minimum(first, m)]) & ok
        second = np.where(same, j[:, col], second)
    ok &= second < m
    if not ok.any():
        return None
    q0 = tgt.points[tgt.point_index[first[ok]]]
    q1 = tgt.points[tgt.point_index[second[ok]]]
    seg = q1 - q0
    lam = ((pw[ok] - q0) * seg).sum(axis=1) / np.maximum((seg * seg).sum(axis=1), 1e-18)
    inside = (lam >= 0.0) & (lam <= 1.0)
    if inside.sum() == 0:
        return None
    idx = np.flatnonzero(ok)[inside]
    ends = np.column_stack([tgt.point_index[first[idx]], tgt.point_index[second[idx]]])
    return src.point_index[idx], ends


def _point_rows(src: PreparedScan, tgt: PreparedScan, matches, x, range_noise: bool) -> _PointRows:
    """Residual rows of point-to-segment matches at pose x (unit weights).

    The segment between two neighbouring target readings stands for the
    surface between them, as in Censi's point-to-line ICP (ICRA 2008),
    which takes its lines from the two nearest readings in the same way:
    the residual is the offset of the transformed source point across the
    segment.  Unlike a point-to-point offset, it carries no error from
    where the two scans happened to sample a curved outline (a post's),
    only the chord's sagitta (about 2 mm for readings 5 cm apart on a
    0.15 m radius).
    """
    i, ends = matches
    c, s = np.cos(x[2]), np.sin(x[2])
    rot_t = np.array([[c, s], [-s, c]])
    rp = src.points[i] @ rot_t
    q0, q1 = tgt.points[ends[:, 0]], tgt.points[ends[:, 1]]
    seg = q1 - q0
    length2 = np.maximum((seg * seg).sum(axis=1), 1e-18)
    n = np.column_stack([-seg[:, 1], seg[:, 0]]) / np.sqrt(length2)[:, None]
    d = rp + x[:2] - q0
    lam = np.clip((d * seg).sum(axis=1) / length2, 0.0, 1.0)
    r = (n * d).sum(axis=1)
    jac = np.column_stack([n[:, 0], n[:, 1], n[:, 1] * rp[:, 0] - n[:, 0] * rp[:, 1]])
    if range_noise:
        src_coef = (n * (src.beams[i] @ rot_t)).sum(axis=1)
        u0, u1 = tgt.beams[ends[:, 0]], tgt.beams[ends[:, 1]]
        tgt_coef = -np.column_stack([(1.0 - lam) * (n * u0).sum(axis=1), lam * (n * u1).sum(axis=1)])
    else:
        src_coef = np.ones(len(r))
        tgt_coef = -np.column_stack([1.0 - lam, lam])
    v = src_coef * src_coef + (tgt_coef * tgt_coef).sum(axis=1)
    return _PointRows(i, ends, r, v, np.ones(len(r)), jac, src_coef, tgt_coef)


def _weigh_with_points(rows: _PointRows, r, v, opt, kernel):
    """Robust weights of the line rows and the point rows under one scale: (w of the lines, rows, scale)."""
    w, scale = _robust(np.concatenate([r, rows.r]), np.concatenate([v, rows.v]), opt, kernel)
    return w[:len(r)], replace(rows, w=w[len(r):]), scale


def _point_middle(rows: _PointRows, om, n_source: int, n_target: int):
    """Censi's middle term (closurecheck.registration.covariance.censi_middle) of the point rows.

    A target reading takes part in the segments of up to two neighbours, so
    its noise is summed over its rows before the outer product, as for the
    readings that fit a target line.
    """
    # The weighted rows and the per-reading sums compiled (_kernels.point_target_sums, bincount's
    # order of additions), the products numpy's (BLAS): ten numpy calls on the rows before.
    a, b, m = _kernels.point_target_sums(rows.jac, om, rows.src_coef, rows.tgt, rows.tgt_coef, n_target)
    return a.T @ b + m.T @ m


def _failed(x, it, merged: int = -1) -> _Solution:
    e = np.zeros(0)
    return _Solution(x, False, it, np.zeros(0, int), np.zeros(0, int), e, e, e, np.zeros((0, 3)), e, e,
                     float("nan"), merged=merged)


_NO_POSES = np.zeros((0, 3))

# A hypothesis refined after one has converged gets this many iterations first; if it is still
# moving then and its fit score is below _RIVAL_BAR times the best converged one's, it stops: its
# score only says how close a look-alike comes (second_fit_score), and one that is still creeping
# along a weak direction or circling between two sets of correspondences after 12 iterations
# rarely ends anywhere better.  On 1,000 candidate pairs of the 5,000-scan warehouse log such
# hypotheses ran to the 30-iteration cap and spent 37% of all ICP iterations; with the rule, 20%
# fewer iterations, the returned hypothesis changed on 3 pairs and no ambiguity decision (at 0.95)
# changed.  The time saved is smaller than the count (the two rules: 5-19% of registration's CPU
# time on 3,000 pairs against 33% of the iterations; docs/performance.md, fifth round).
_RIVAL_PROBE_ITERATIONS = 12
_RIVAL_BAR = 0.8


def _reached_found(x, found, src: PreparedScan, opt: RegistrationOptions) -> int:
    """Row of ``found`` (m, 3) that pose x is within ``reassociate_m`` of (_kernels.reached), or -1.

    Within ``reassociate_m`` of a pose another hypothesis converged to,
    every source point is within that distance of where it lies at that
    pose, so ICP would associate the same lines there and end at the same
    solution: the hypothesis stops instead of refining it again.  On 300
    candidate pairs of the 5,000-scan warehouse log, 428 hypotheses stopped
    so, 16% of all ICP iterations, and every one of them ended, when run on,
    at the pose it reached (within ``hypothesis_separation_m``; within 1 mm
    for 393 of them, at most 5.3 mm).
    """
    return int(_kernels.reached(np.asarray(x, dtype=float), found, src.radius_m, opt.reassociate_m))


def _candidate_index(src: PreparedScan, cos_max) -> np.ndarray:
    """Indices of the source points that may be matched: those with a line when normals are checked, else all."""
    return src.line_index if cos_max is not None else np.arange(len(src.points))


def _candidates(src: PreparedScan, cos_max):
    """Source points that may be matched: (indices, points, normals), gathered once per source scan."""
    key = ("cands", cos_max is not None)
    got = src._lazy.get(key)
    if got is None:
        cand = _candidate_index(src, cos_max)
        got = (cand, src.points[cand], src.normals[cand])
        src._lazy[key] = got
    return got


def _associate(src: PreparedScan, tgt: PreparedScan, x, opt, cos_max, cands=None):
    """Point-to-line correspondences of the source under pose x (vectorised).

    With the normal check on, only source points on straight structure take
    part: a point without a line of its own (a corner, clutter) cannot be
    checked and is the typical false match across a corner or a thin wall.
    ``cands`` is :func:`_candidates` of the source (computed here if None).
    Returns (i, j, p, u, lt): source indices, target line indices, the
    source points and beam directions, and the target line rows transposed
    to (14, n) (contiguous columns make the per-iteration arithmetic cheaper).
    """
    cand, cand_pts, cand_normals = cands if cands is not None else _candidates(src, cos_max)
    c, s = np.cos(x[2]), np.sin(x[2])
    rot_t = np.array([[c, s], [-s, c]])
    pw = cand_pts @ rot_t + x[:2]
    # The nearest line, the support and the normal tests in one compiled call (_kernels.associate:
    # a dozen numpy calls on a few hundred rows cost more than the arithmetic); the rotations stay
    # numpy products (BLAS), as before.
    nr = cand_normals @ rot_t if cos_max is not None else pw
    keep, j, lt, tied = _kernels.associate(*tgt._target_side()[4], pw, nr, tgt.line, opt.max_correspondence_m,
                                           opt.max_extrapolation_m, -np.inf if cos_max is None else cos_max,
                                           cos_max is not None)
    if tied:
        # Two line points at exactly the nearest distance (duplicates): the kd-tree's pick, as before.
        _, j = _nearest_line(tgt, pw, opt.max_correspondence_m)
        hit = np.flatnonzero(j < len(tgt.line_index))
        j, pw = j[hit], pw[hit]
        ln = tgt.line[j]
        along = np.abs(ln[:, 3] * (pw[:, 0] - ln[:, 0]) - ln[:, 2] * (pw[:, 1] - ln[:, 1]))
        ok = along <= ln[:, 13] + opt.max_extrapolation_m
        if cos_max is not None:
            agree = (nr[hit] * ln[:, 2:4]).sum(axis=1)
            ok &= agree >= cos_max
        keep, j, lt = hit[ok], j[ok], np.ascontiguousarray(ln[ok].T)
    i = cand[keep]
    return i, j, src.points[i], src.beams[i], lt


def _linearise(pairs, x, opt, range_noise: bool):
    """Residuals, variance units, Jacobians, along-line offsets, source sensitivities and r / sqrt(v) at pose x.

    The residual is the source point's offset across the target's local
    line minus the local model's offset there, ``r = n.(p - c) - f(s)``
    with ``s = t.(p - c)``; its gradient with respect to the point is
    ``g = n - f'(s) t``.
    """
    _, _, p, u, lt = pairs
    c, s = np.cos(x[2]), np.sin(x[2])
    rot_t = np.array([[c, s], [-s, c]])
    rp = p @ rot_t
    ub = u @ rot_t if range_noise else rp
    # Element by element in one compiled call (_kernels.linearise), the numpy expressions' order of
    # operations kept: about 25 numpy calls on a few hundred rows per ICP iteration before.
    r, v, jac, s_al, phi2, sc, z = _kernels.linearise(rp, ub, lt, float(x[0]), float(x[1]), opt.min_incidence_cos,
                                                      range_noise)
    return r, v, jac, (s_al, phi2), sc, z


def _median(a) -> float:
    """np.median of a non-empty 1-D array (same value), without its general-case overhead."""
    k = len(a) // 2
    if len(a) % 2:
        return float(np.partition(a, k)[k])
    part = np.partition(a, [k - 1, k])
    return float((part[k - 1] + part[k]) / 2)


def _robust(r, v, opt, kernel, z=None):
    """Robust weights and scale of residuals r with variance units v (``z = r / sqrt(v)`` if given)."""
    if z is None:
        z = r / np.sqrt(v)
    scale = max(_MAD_TO_SIGMA * _median(np.abs(z)), opt.min_noise_m)
    w = kernel.weight(z / scale)
    return w, scale


def _icp_line(src: PreparedScan, tgt: PreparedScan, x0, opt: RegistrationOptions, kernel,
              found=_NO_POSES, iterations: int | None = None) -> _Solution:
    cos_max = np.cos(opt.max_normal_angle_rad) if opt.max_normal_angle_rad < np.pi else None
    lscale = np.array([1.0, 1.0, src.length_m ** 2])
    if kernel.name == "huber":
        # The default kernel: the whole loop in one compiled call (_kernels.icp_line, the same
        # iterations in a fixed order of additions).  Measured on a 5,000-scan warehouse log: 230 µs
        # per iteration as a Python loop of numpy and kernel calls, 480 µs with small objects.
        cand = _candidate_index(src, cos_max)
        has_points = len(src.point_index) > 0 and len(tgt.point_index) >= 2
        target_index = tgt._target_side()[4]
        pp_index = tgt._point_cells() if has_points else target_index
        (x, converged, it, status, i, j, r, v, w, jac, s_along, sc, scale,
         m_src, m_ends, pr, pv, pw, pjac, psc, ptc) = _kernels.icp_line(
            *target_index, tgt.line, cand, src.normals, src.points, src.beams, np.array(x0, dtype=float), lscale,
            opt.max_iterations if iterations is None else iterations, opt.reassociate_m,
            opt.max_correspondence_m, opt.max_extrapolation_m, -np.inf if cos_max is None else cos_max,
            cos_max is not None, opt.min_incidence_cos, src.point_noise == "range", kernel.scale, _MAD_TO_SIGMA,
            opt.min_noise_m, opt.damping, opt.tolerance_m, opt.tolerance_rad, src.radius_m,
            has_points, *pp_index, tgt.point_object, src.point_index, tgt.point_index, tgt.points, tgt.beams,
            found, opt.reassociate_m)
        if status != 2:     # 2: a tie between nearest points, which the loop below resolves with the kd-tree
            x[2] = np.pi - np.mod(np.pi - x[2], 2 * np.pi)
            if status == 1:
                return _failed(x, it)
            if status == 3:     # reached found[scale] at the start of iteration it
                return _failed(x, it - 1, int(scale))
            rows = _PointRows(m_src, m_ends, pr, pv, pw, pjac, psc, ptc) if len(m_src) else None
            return _Solution(x, converged, it, i, j, r, v, w, jac, s_along, sc, scale, rows)
    return _icp_line_loop(src, tgt, x0, opt, kernel, cos_max, lscale, found, iterations)


def _icp_line_loop(src: PreparedScan, tgt: PreparedScan, x0, opt: RegistrationOptions, kernel, cos_max,
                   lscale, found=_NO_POSES, iterations: int | None = None) -> _Solution:
    """Point-to-line ICP as a Python loop: any kernel, small objects, ties between nearest points."""
    x = np.array(x0, dtype=float)
    range_noise = src.point_noise == "range"
    lscale_diag = np.diag(lscale)
    converged = False
    it = 0
    pairs = None
    moved = np.inf     # bound on any source point's motion since the last association (m)
    cands = _candidates(src, cos_max)
    matches = prow = None
    has_points = len(src.point_index) > 0 and tgt.point_tree is not None
    for it in range(1, (opt.max_iterations if iterations is None else iterations) + 1):
        hit = _reached_found(x, found, src, opt)
        if hit >= 0:
            x[2] = np.pi - np.mod(np.pi - x[2], 2 * np.pi)
            return _failed(x, it - 1, hit)
        # Re-associating costs a kd-tree query; once the pose moves by less
        # than reassociate_m the nearest lines cannot change enough to matter.
        if moved >= opt.reassociate_m:
            pairs = _associate(src, tgt, x, opt, cos_max, cands)
            if has_points:
                matches = _associate_points(src, tgt, x, opt)
            moved = 0.0
        if len(pairs[0]) + (0 if matches is None else len(matches[0])) < 3:
            pairs = None
            break
        r, v, jac, s_al, sc, z = _linearise(pairs, x, opt, range_noise)
        if matches is None:
            # No small-object rows at this pose: rows of an earlier association, made at an earlier
            # pose, would otherwise reach the covariance (32 of the demo log's ICP runs).
            prow = None
            if kernel.name == "huber":
                # One compiled call for the default kernel (_kernels.huber_rows, the same values).
                w, scale, jw = _kernels.huber_rows(z, v, jac, kernel.scale, _MAD_TO_SIGMA, opt.min_noise_m)
            else:
                w, scale = _robust(r, v, opt, kernel, z)
                jw = jac * (w / v)[:, None]
            h = jw.T @ jac
            g = jw.T @ r
        else:
            w, prow, scale = _weigh_with_points(_point_rows(src, tgt, matches, x, range_noise), r, v, opt, kernel)
            jw = np.concatenate([jac * (w / v)[:, None], prow.jac * (prow.w / prow.v)[:, None]])
            jall = np.concatenate([jac, prow.jac])
            h = jw.T @ jall
            g = jw.T @ np.concatenate([r, prow.r])
        mu = opt.damping * float(np.trace(h / lscale)) / 3.0
        step = -np.linalg.solve(h + mu * lscale_diag, g)
        x = x + step
        moved += np.hypot(step[0], step[1]) + src.radius_m * abs(step[2])
        if np.hypot(step[0], step[1]) < opt.tolerance_m and abs(step[2]) < opt.tolerance_rad:
            converged = True
            break
    x[2] = np.pi - np.mod(np.pi - x[2], 2 * np.pi)
    if pairs is None:
        return _failed(x, it)
    if matches is not None:
        # The rows at the final pose (the loop's last rows are from before its last step).
        r, v, jac, s_al, sc, _ = _linearise(pairs, x, opt, range_noise)
        w, prow, scale = _weigh_with_points(_point_rows(src, tgt, matches, x, range_noise), r, v, opt, kernel)
    return _Solution(x, converged, it, pairs[0], pairs[1], r, v, w, jac, np.stack(s_al, axis=1), sc, scale, prow)


def _icp_point(src: PreparedScan, tgt: PreparedScan, x0, opt: RegistrationOptions, kernel,
               found=_NO_POSES, iterations: int | None = None) -> _Solution:
    """Point-to-point ICP with the closed-form weighted 2D Procrustes step."""
    x = np.array(x0, dtype=float)
    tpts = tgt.points[tgt.line_index]
    converged = False
    it = 0
    for it in range(1, (opt.max_iterations if iterations is None else iterations) + 1):
        hit = _reached_found(x, found, src, opt)
        if hit >= 0:
            x[2] = np.pi - np.mod(np.pi - x[2], 2 * np.pi)
            return _failed(x, it - 1, hit)
        c, s = np.cos(x[2]), np.sin(x[2])
        pw = src.points @ np.array([[c, s], [-s, c]]) + x[:2]
        d, j = tgt.tree.query(pw, distance_upper_bound=opt.max_correspondence_m)
        ok = j < len(tpts)
        if ok.sum() < 3:
            break
        a, b, d = src.points[ok], tpts[j[ok]], d[ok]
        scale = max(_MAD_TO_SIGMA * float(np.median(d)), opt.min_noise_m)
        w = kernel.weight(d / scale)
        wsum = w.sum()
        ma = (w[:, None] * a).sum(0) / wsum
        mb = (w[:, None] * b).sum(0) / wsum
        aa, bb = a - ma, b - mb
        sxx = (w * (aa[:, 0] * bb[:, 0] + aa[:, 1] * bb[:, 1])).sum()
        sxy = (w * (aa[:, 0] * bb[:, 1] - aa[:, 1] * bb[:, 0])).sum()
        th = np.arctan2(sxy, sxx)
        c, s = np.cos(th), np.sin(th)
        t = mb - np.array([c * ma[0] - s * ma[1], s * ma[0] + c * ma[1]])
        new = np.array([t[0], t[1], th])
        step = new - x
        step[2] = np.pi - np.mod(np.pi - step[2], 2 * np.pi)
        x = new
        if np.hypot(step[0], step[1]) < opt.tolerance_m and abs(step[2]) < opt.tolerance_rad:
            converged = True
            break
    # The covariance and quality figures always come from the point-to-line
    # cost at the final pose (Bonnabel, Barczyk and Goulette, arXiv 1410.7632:
    # the closed-form covariance of the point-to-point cost is unreliable).
    cos_max = np.cos(opt.max_normal_angle_rad) if opt.max_normal_angle_rad < np.pi else None
    pairs = _associate(src, tgt, x, opt, cos_max)
    if len(pairs[0]) < 3:
        return _failed(x, it)
    r, v, jac, s_al, sc, z = _linearise(pairs, x, opt, src.point_noise == "range")
    w, scale = _robust(r, v, opt, kernel, z)
    return _Solution(x, converged, it, pairs[0], pairs[1], r, v, w, jac, np.stack(s_al, axis=1), sc, scale)


def _fit_score(src: PreparedScan, tgt: PreparedScan, x, opt: RegistrationOptions) -> float:
    """Mean over the evenly spread source points of ``exp(-d^2 / (2 fit_sigma_m^2))`` at pose x.

    ``d`` is the distance to the nearest target point on straight structure
    or of a small object (:func:`_point_like`);
    the source points are the coarse stage's (one per cell), so that densely
    sampled walls near the sensor do not outweigh the rest of the scan.
    Point-to-point distances, unlike the point-to-line residuals, penalise a
    hypothesis slid along a wall beyond where the target saw it, which is
    what a look-alike alternative in a corridor or a row of doorways does.
    """
    c, s = np.cos(x[2]), np.sin(x[2])
    pts = src.coarse_points
    pw = pts @ np.array([[c, s], [-s, c]]) + x[:2]
    if len(tgt.point_index):
        # fit_tree's points are the line points and the small objects' readings: the nearer of the
        # compiled lookups over each, which ICP uses too, is the nearest of them at the same distance
        # (only distances are used, so a tie between two nearest points needs no tree: 120 µs a call
        # with the tree's query).  A third index over their union cost 6 numpy calls and a kernel
        # (register(..., coarse=False) about 1% faster a hall or lot pair, 40 interleaved rounds).
        q = np.ascontiguousarray(pw)
        upper = 4.0 * opt.fit_sigma_m
        d = np.minimum(_kernels.nearest(*tgt._target_side()[4], q, upper)[0],
                       _kernels.nearest(*tgt._point_cells(), q, upper)[0])
    else:   # fit_tree is the line tree: the compiled lookup gives its answers
        d, _ = _nearest_line(tgt, pw, 4.0 * opt.fit_sigma_m)
    # The finite distances' exponents in one compiled call (_kernels.fit_exponents), numpy's exp.
    return float(np.exp(_kernels.fit_exponents(d, opt.fit_sigma_m)).sum() / len(pts))


def _same(a, b, opt) -> bool:
    dt = abs(se2.wrap(a[2] - b[2]))
    return np.hypot(a[0] - b[0], a[1] - b[1]) < opt.hypothesis_separation_m and dt < opt.hypothesis_separation_rad


def _finish(src: PreparedScan, tgt: PreparedScan, sol: _Solution, opt: RegistrationOptions, ranking,
            **extra) -> Registration:
    """The Registration of solution ``sol``; ``ranking(covariance)`` gives its fit-score figures (_ranking)."""
    pr = sol.points
    n = len(sol.r) if pr is None else len(sol.r) + len(pr.src)        # matches
    if n < 3:
        return _no_overlap(src, sol, opt, ranking, **extra)
    if pr is None:
        om = sol.w / sol.v
        r_all, om_all, jac_all, v_all = sol.r, om, sol.jac, sol.v
    else:
        r_all, v_all, om_all, jac_all = _kernels.stack_rows(sol.r, sol.v, sol.w, sol.jac, pr.r, pr.v, pr.w, pr.jac)
        om = om_all[:len(sol.r)]
    h = _cov.hessian(jac_all, om_all)
    e_wu2, kappa = _kernel_of(opt)[1]
    sigma2 = _cov.noise_variance(r_all, om_all, e_wu2)
    middle = None
    if opt.covariance == "censi":
        # sol.s_along (n, 2): s and the third basis function of each residual's line model.
        middle = _cov.censi_middle_lines(sol.jac, om, sol.src_coef, sol.tgt, tgt.nbr_index, tgt.nbr_coef,
                                         sol.s_along, len(tgt.points))
        if pr is not None:
            middle = middle + _point_middle(pr, om_all[len(sol.r):], len(src.points), len(tgt.points))
    est = _cov.analyse(h, middle, sigma2, len(r_all), src.length_m, method=opt.covariance,
                       degeneracy_threshold=opt.degeneracy_threshold,
                       unobservable_sigma_m=opt.unobservable_sigma_m, kappa=kappa,
                       points_per_normal=float(opt.line_neighbours))
    # The inliers' root-mean-square residual and count in one compiled call (_kernels.inlier_rmse,
    # np.add.reduce's order of additions): seven numpy calls before.  With the stacked rows
    # (_kernels.stack_rows) and the small objects' middle term (_point_middle), register(...,
    # coarse=False) 3-5% faster a hall or lot pair (median of 40 interleaved rounds of
    # benchmarks/registration_scenes.py pairs, about 25 µs).
    rmse, n_in = _kernels.inlier_rmse(r_all, v_all, opt.inlier_sigmas * sol.scale)
    delta = sol.x.copy()
    cov = est.covariance
    evals = est.eigenvalues.copy()
    weak = est.eigenvectors[:, 0].copy()
    for arr in (delta, cov, evals, weak):
        arr.flags.writeable = False
    return Registration(
        delta=delta, covariance=cov, rmse=rmse, overlap=n / len(src.points), converged=sol.converged,
        iterations=sol.iterations, inlier_fraction=n_in / len(r_all), correspondences=n,
        sigma_m=est.sigma_m, eigenvalues=evals, weakest_direction=weak, degeneracy=est.degeneracy,
        degenerate=est.degenerate, **ranking(cov), **extra,
    )


def _no_overlap(src: PreparedScan, sol: _Solution, opt: RegistrationOptions, ranking, **extra) -> Registration:
    """Result for a start from which fewer than 3 correspondences were found.

    Not an input error: two valid scans simply do not overlap there.  The
    pose is the last iterate, every direction counts as unconstrained.
    """
    big = opt.unobservable_sigma_m ** 2
    cov = np.diag([big, big, big / src.length_m ** 2])
    delta = sol.x.copy()
    evals = np.zeros(3)
    weak = np.array([1.0, 0.0, 0.0])
    for arr in (delta, cov, evals, weak):
        arr.flags.writeable = False
    return Registration(
        delta=delta, covariance=cov, rmse=float("nan"), overlap=len(sol.r) / len(src.points), converged=False,
        iterations=sol.iterations, inlier_fraction=0.0, correspondences=len(sol.r), sigma_m=float("nan"),
        eigenvalues=evals, weakest_direction=weak, degeneracy=0.0, degenerate=True, **ranking(cov), **extra,
    )


# --------------------------------------------------------------------------- public API


def register_prepared(source: PreparedScan, target: PreparedScan, guess=(0.0, 0.0, 0.0),
                      options: RegistrationOptions = DEFAULT_OPTIONS, *, guess_covariance=None) -> Registration:
    """Register two prepared scans (see :func:`register` for the meaning of the result).

    Parameters
    ----------
    source, target : scans from :func:`prepare_scan` with the same
        preparation settings as ``options`` (the target's line models and
        grid are built here if they were not yet).
    guess : (3,) initial pose of the source in the target frame, or (K, 3)
        several seeds (e.g. yaw candidates from descriptors); every seed is
        searched / refined and the best fit wins.
    options : registration settings.
    guess_covariance : (3, 3) covariance of the guess on (x, y, theta) in
        the target frame (m^2, m rad, rad^2), or None; sizes the coarse
        search around each seed (:func:`coarse_window`).  Ignored when
        ``options.coarse`` is off.

    Examples
    --------
    Prepare two scans of a simulated log once and register them:

    >>> import numpy as np
    >>> import closurecheck
    >>> from closurecheck.core import se2
    >>> from closurecheck.registration.icp import RegistrationOptions, prepare_scan, register_prepared
    >>> log = closurecheck.simulate_log("ring", seed=4, scans=60)
    >>> opt = RegistrationOptions(coarse=False)
    >>> a, b = prepare_scan(log.points(20), opt, grid=False), prepare_scan(log.points(25), opt, grid=False)
    >>> res = register_prepared(b, a, se2.between(log.odom[20], log.odom[25]), opt)
    >>> err = se2.between(se2.between(log.truth[20], log.truth[25]), res.delta)
    >>> bool(res.converged), bool(np.hypot(err[0], err[1]) < 0.02)
    (True, True)
    """
    if not isinstance(source, PreparedScan) or not isinstance(target, PreparedScan):
        raise InputError("register_prepared needs scans built by prepare_scan")
    if source.key != options.preparation_key() or target.key != options.preparation_key():
        raise InputError("scans were prepared with different line or grid settings than these options")
    return _register_prepared(source, target, _as_seeds(guess), options, _as_guess_covariance(guess_covariance))


def _register_prepared(source: PreparedScan, target: PreparedScan, seeds, options: RegistrationOptions,
                       guess_cov) -> Registration:
    kernel = _kernel_of(options)[0]
    refine = _icp_point if options.method == "point_to_point" else _icp_line

    coarse_best = coarse_second = float("nan")
    starts = seeds
    if options.coarse:
        grid = target.grid
        step = options.coarse_angle_step_rad or _coarse.auto_angle_step(source.coarse_points,
                                                                         options.coarse_resolution_m)
        window_m, window_rad = coarse_window(guess_cov, options, step)
        # One search over the union of the seeds' windows: a block near a wrong seed is pruned by
        # the hypotheses found near the right one instead of being searched on its own.
        poses, scores = _coarse.search(grid, source.coarse_points, seeds, window_m=window_m,
                                       window_rad=window_rad, angle_step_rad=step,
                                       n_best=options.hypotheses, separation_m=options.hypothesis_separation_m,
                                       separation_rad=options.hypothesis_separation_rad)
        starts = poses
        coarse_best = float(scores[0])
        coarse_second = float(scores[1]) if len(scores) > 1 else float("nan")

    # Each hypothesis stops once it reaches a pose an earlier one converged to (_reached_found); it
    # then takes that pose's fit score, so the earlier one ranks first among the equal scores and the
    # stopped one counts as the same hypothesis, as it would after converging there.
    sols: list[_Solution] = []
    fits = np.empty(len(starts))
    probe = _RIVAL_PROBE_ITERATIONS
    for k, x0 in enumerate(starts):
        done = [i for i in range(k) if sols[i].converged]
        found = np.array([sols[i].x for i in done]) if done else _NO_POSES
        if done and options.max_iterations > probe:
            # A converged hypothesis sets the bar (_RIVAL_BAR): one still moving after the probe's
            # iterations with a fit well below it stops there, a rival.
            sol = refine(source, target, x0, options, kernel, found, probe)
            if sol.merged < 0 and not sol.converged and sol.iterations == probe:
                fit_now = _fit_score(source, target, sol.x, options)
                if fit_now < _RIVAL_BAR * max(fits[i] for i in done):
                    fits[k] = fit_now
                    sols.append(sol)
                    continue
                more = refine(source, target, sol.x, options, kernel, found, options.max_iterations - probe)
                sol = replace(more, iterations=probe + more.iterations)
        else:
            sol = refine(source, target, x0, options, kernel, found)
        if sol.merged >= 0:
            sol = replace(sol, x=sols[done[sol.merged]].x)
            fits[k] = fits[done[sol.merged]]
        else:
            fits[k] = _fit_score(source, target, sol.x, options)
        sols.append(sol)
    best = int(fits.argmax())       # the method: np.argmax adds 0.9 µs of dispatch to a 0.2 µs search
    return _finish(source, target, sols[best], options, lambda cov: _ranking(sols, fits, best, cov, options),
                   coarse_ran=bool(options.coarse), coarse_score=coarse_best, coarse_second_score=coarse_second)


# The robust kernel of each (name, scale) with its Gaussian moments (covariance.kernel_moments), built
# once: building a Kernel checks its settings and the moments' cache hashes it, 3.3 µs a registration.
_KERNELS: dict = {}


def _kernel_of(opt: RegistrationOptions):
    """(kernel, (E[w u^2], kappa)) of ``opt.kernel`` at ``opt.kernel_scale``."""
    key = (opt.kernel, opt.kernel_scale)
    got = _KERNELS.get(key)
    if got is None:
        kernel = kernel_from_name(*key)
        got = (kernel, _cov.kernel_moments(kernel))
        if len(_KERNELS) >= 64:     # a caller sweeping kernel scales does not grow it without bound
            _KERNELS.clear()
        _KERNELS[key] = got
    return got


def _ranking(sols: list, fits, best: int, covariance, options: RegistrationOptions) -> dict:
    """The fit-score figures of a Registration: the winner's, its best distinct rival's, their gap and ratio.

    A rival is distinct when it lies outside the separation box (_same) or when it converged
    outside the chi-square bound at ``rival_probability`` of the winner's ``covariance`` (3, 3):
    a covariance of a few millimetres along an aisle is a claim that a second alignment 0.3 m
    along it, fitting as well, does not exist.
    """
    second = float("nan")
    if len(sols) > 1:
        x_best = sols[best].x
        gate = chi2_threshold(options.rival_probability)
        second = 0.0
        for k in range(len(sols)):
            if k == best or fits[k] <= second:
                continue
            if not _same(sols[k].x, x_best, options) or (sols[k].converged and _outside(sols[k].x, x_best,
                                                                                        covariance, gate)):
                second = fits[k]
    fit = float(fits[best])
    gap = fit - second if math.isfinite(second) else float("nan")
    amb = (second / fit if fit > 0 else 1.0) if math.isfinite(second) else float("nan")
    return dict(fit_score=fit, second_fit_score=second, score_gap=gap, ambiguity=amb, hypotheses=len(sols))


def _outside(x, x_best, covariance, gate: float) -> bool:
    """Squared Mahalanobis distance of pose x from x_best under ``covariance`` exceeds ``gate``."""
    d = np.asarray(x, dtype=float) - x_best
    d[2] = se2.wrap(d[2])
    return float(d @ np.linalg.solve(covariance, d)) > gate


# Options records built from keyword overrides, by (record, overrides with their types): checking
# every setting costs about 0.2 ms, a few percent of a call of register, and callers repeat the same
# overrides (coarse=False) call after call.  Keyed by the record's identity, the entry holding the
# record itself (so its id cannot be reused while cached): hashing and comparing a record of 40
# settings cost 15 µs a call, a tenth of register(..., coarse=False) on a sparse scan.
_OVERRIDDEN: dict = {}


def _with_overrides(opt: RegistrationOptions, overrides: dict) -> RegistrationOptions:
    try:
        key = (id(opt), tuple(sorted((k, type(v), v) for k, v in overrides.items())))
        hash(key)
    except TypeError:
        key = None
    entry = _OVERRIDDEN.get(key) if key is not None else None
    if entry is not None and entry[0] is opt:
        return entry[1]
    unknown = sorted(set(overrides) - {f.name for f in fields(RegistrationOptions)})
    if unknown:
        raise InputError(f"unknown registration option(s): {', '.join(unknown)}")
    got = replace(opt, **overrides)
    if key is not None:
        if len(_OVERRIDDEN) >= 64:
            _OVERRIDDEN.clear()
        _OVERRIDDEN[key] = (opt, got)
    return got


def register(source_xy, target_xy, guess=(0.0, 0.0, 0.0), options: RegistrationOptions | None = None, *,
             guess_covariance=None, **overrides) -> Registration:
    """Register a source scan to a target scan (docs/formats.md, "Python API").

    Parameters
    ----------
    source_xy, target_xy : (N, 2) points of each scan in its own sensor frame
        (metres, sensor at the origin).
    guess : (3,) initial pose [x, y, theta] of the source in the target frame
        (metres, radians), or (K, 3) several seeds.
    options : RegistrationOptions; keyword ``overrides`` replace single
        fields, e.g. ``register(a, b, coarse=False, covariance="hessian")``.
    guess_covariance : (3, 3) covariance of the guess on (x, y, theta) in
        the target frame (m^2, m rad, rad^2; e.g. odometry's), or None.  The
        coarse search around the guess then covers the bounding box of its
        99.9% confidence ellipsoid (at least two grid cells and two angle
        steps, at most ``coarse_window_m`` / ``coarse_window_rad``) instead
        of the wide default of +-3.5 m and +-0.85 rad, which is what costs
        time when the guess is good.  A caller who knows a window rather
        than a covariance sets ``coarse_window_m`` and ``coarse_window_rad``
        (half-widths) directly.  Ignored with ``coarse=False``.

    Returns
    -------
    Registration with ``delta`` (3,): the pose T with ``target ≈ T · source``,
    i.e. ``a^-1 ∘ b`` for a target scan taken at pose a and a source scan
    taken at pose b; ``covariance`` (3, 3) on (x, y, theta) in the target
    frame; ``rmse`` (m), ``overlap``, ``converged`` and quality figures.

    When no start finds at least 3 correspondences the result has
    ``converged=False``, ``overlap`` near 0 and a covariance of
    ``unobservable_sigma_m`` in every direction.

    Raises InputError for arrays that are not (N, 2) with N >= 3 finite
    points, a scan without straight structure, a bad guess, a guess
    covariance that is not a symmetric positive semi-definite (3, 3) array,
    or bad options.

    Examples
    --------
    Two scans of a simulated corridor 1 m apart (docs/formats.md, "Python API"):

    >>> import numpy as np
    >>> import closurecheck
    >>> from closurecheck.core import se2
    >>> log = closurecheck.simulate_log("ring", seed=4, scans=60)
    >>> a, b = 20, 25
    >>> res = closurecheck.register(log.points(b), log.points(a), guess=se2.between(log.odom[a], log.odom[b]))
    >>> err = se2.between(se2.between(log.truth[a], log.truth[b]), res.delta)
    >>> bool(res.converged), bool(np.hypot(err[0], err[1]) < 0.02), bool(abs(err[2]) < np.radians(0.5))
    (True, True, True)
    >>> bool(np.all(np.linalg.eigvalsh(res.covariance) > 0))
    True

    With the guess's uncertainty (here about 10 cm and 2 degrees, one
    sigma) the coarse search is sized to it rather than to +-3.5 m:

    >>> cov = np.diag([0.1 ** 2, 0.1 ** 2, np.radians(2.0) ** 2])
    >>> res = closurecheck.register(log.points(b), log.points(a), guess=se2.between(log.odom[a], log.odom[b]),
    ...                             guess_covariance=cov)
    >>> err = se2.between(se2.between(log.truth[a], log.truth[b]), res.delta)
    >>> bool(res.converged), bool(np.hypot(err[0], err[1]) < 0.02), bool(abs(err[2]) < np.radians(0.5))
    (True, True, True)
    """
    opt = options if options is not None else DEFAULT_OPTIONS
    if overrides:
        opt = _with_overrides(opt, overrides)
    src = _as_points(source_xy, "source_xy")
    tgt = _as_points(target_xy, "target_xy")
    seeds = _as_seeds(guess)
    guess_cov = _as_guess_covariance(guess_covariance)
    # The target side of the source and the grid of the target are built only if used.
    return _register_prepared(_prepare(src, opt, False), _prepare(tgt, opt, False), seeds, opt, guess_cov)
