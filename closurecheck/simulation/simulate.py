"""Scenario generator: simulated scan logs with ground truth from invented floor plans.

A differential-drive robot follows the plan's route with a pure-pursuit
controller (limited turn rate, slower in tight turns).  A 2D range sensor
on the robot takes a scan every ``scan_period_s``; each scan is an exact ray
cast against the static plan and the moving objects at that instant (no
motion distortion within a scan), then gets Gaussian range noise, rounding
to the sensor's resolution, random single-beam dropouts and occasional
bursts of consecutive dropouts.

Odometry is integrated from noisy per-scan increments: a random walk whose
size is recorded in the header under ``"odometry_noise"`` (positional std
per axis ``a * sqrt(distance)``, heading std
``sqrt(b**2 * distance + c**2 * |rotation|)``) plus systematic errors that
the header does not describe (a heading bias per metre as from unequal wheel
diameters, a distance scale error, a turn scale error as from a wrong
wheelbase), which is what makes the drift grow to metres over a few hundred
metres, and optionally rare slips (a sudden jump in one step).  These are the
two kinds of systematic error of differential-drive odometry that Borenstein
and Feng measure with their square-path test (UMBmark, IEEE Trans. Robotics
and Automation 12(6), 1996): unequal wheel diameters (a heading bias per
metre, their "Type B") and an uncertain wheelbase (a turn scale error, their
"Type A").  The header can also be left out or made to understate the random
walk (``odom_header_factor``), as users' logs often do.  Odometry starts at
``[0, 0, 0]``; ``truth`` is in the floor plan's frame.

Every random draw is made in fixed-size blocks of scans from streams split
off one seed, so a log cut at N scans is exactly the first N scans of a
longer log with the same seed.  Slips draw from a stream of their own, so
logs without slips are the same as before slips existed.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from ..core import se2
from ..errors import InputError
from ..io.scanlog import ScanLog, Sensor, make_scanlog
from . import floorplans, raycast
from .floorplans import FloorPlan

SCENARIOS = dict(floorplans.FLOORPLANS)
DEFAULT_SCENARIO = "warehouse"


@dataclass(frozen=True)
class SimOptions:
    """Robot, sensor and noise settings of a simulated log (SI units).

    Sensor: ``beams`` evenly spaced over ``field_of_view_rad`` centred on the
    robot's heading; ``max_range_m=None`` takes the floor plan's range.
    Motion: ``speed_m_s`` on straights, never below ``min_speed_m_s`` in
    turns, turn rate at most ``max_turn_rate_rad_s``, steering towards a
    point ``lookahead_m`` ahead on the route; the controller runs
    ``control_steps_per_scan`` times per scan period.

    Odometry: random walk ``odom_translation_m_per_sqrt_m``,
    ``odom_heading_rad_per_sqrt_m``, ``odom_heading_rad_per_sqrt_rad``
    (the module docstring); systematic errors: a heading bias
    ``odom_heading_bias_rad_per_m`` per metre driven, the distance driven
    read ``1 + odom_distance_scale_error`` times too long, each rotation
    read ``1 + odom_turn_scale_error`` times too large.  Slips happen at
    ``odom_slip_rate_per_m`` per metre driven; a slip adds to one step a
    jump of uniform direction and length up to ``odom_slip_max_m`` and a
    heading jump uniform in ``±odom_slip_max_rad``.  The header states the
    random walk's coefficients divided by ``odom_header_factor`` (1: the
    truth; 3: understated three times); ``None`` writes no
    ``odometry_noise`` header at all.
    """

    beams: int = 721
    field_of_view_rad: float = 1.5 * math.pi
    min_range_m: float = 0.05
    max_range_m: float | None = None
    range_noise_std_m: float = 0.015
    range_resolution_m: float = 0.001
    dropout_probability: float = 0.01
    burst_probability_per_scan: float = 0.03
    burst_min_beams: int = 5
    burst_max_beams: int = 40
    scan_period_s: float = 0.2
    speed_m_s: float = 1.0
    min_speed_m_s: float = 0.35
    max_turn_rate_rad_s: float = 0.8
    lookahead_m: float = 1.0
    control_steps_per_scan: int = 10
    robot_radius_m: float = 0.3
    odom_translation_m_per_sqrt_m: float = 0.01
    odom_heading_rad_per_sqrt_m: float = 0.0005
    odom_heading_rad_per_sqrt_rad: float = 0.005
    odom_heading_bias_rad_per_m: float = 0.0004
    odom_distance_scale_error: float = 0.002
    odom_turn_scale_error: float = 0.0
    odom_slip_rate_per_m: float = 0.0
    odom_slip_max_m: float = 0.3
    odom_slip_max_rad: float = math.radians(5.0)
    odom_header_factor: float | None = 1.0
    scans_per_block: int = 256

    def sensor(self, plan: FloorPlan) -> Sensor:
        """The sensor geometry for this plan (bearings centred on straight ahead)."""
        fov = float(self.field_of_view_rad)
        max_range = plan.max_range_m if self.max_range_m is None else float(self.max_range_m)
        return Sensor(first_angle=-fov / 2, angle_step=fov / (self.beams - 1), beams=int(self.beams),
                      min_range=float(self.min_range_m), max_range=float(max_range))

    def odometry_noise_header(self) -> dict | None:
        """The random-walk part of the odometry noise as written to the log header (None: no header).

        Divided by ``odom_header_factor``: a factor of 1 states the truth.
        """
        if self.odom_header_factor is None:
            return None
        f = float(self.odom_header_factor)
        # Dividing by exactly 1.0 keeps the default header's numbers bit for bit.
        return {"translation_m_per_sqrt_m": self.odom_translation_m_per_sqrt_m / f,
                "heading_rad_per_sqrt_m": self.odom_heading_rad_per_sqrt_m / f,
                "heading_rad_per_sqrt_rad": self.odom_heading_rad_per_sqrt_rad / f}

    def odometry_errors_note(self) -> str:
        """What the header does not say about the odometry, in words ("" for the default settings)."""
        keys = ("odom_heading_bias_rad_per_m", "odom_distance_scale_error", "odom_turn_scale_error",
                "odom_slip_rate_per_m", "odom_slip_max_m", "odom_slip_max_rad", "odom_header_factor")
        if all(getattr(self, k) == getattr(DEFAULT_OPTIONS, k) for k in keys):
            return ""
        text = (f"odometry systematic errors: heading bias {math.degrees(self.odom_heading_bias_rad_per_m) * 100:g} "
                f"deg/100 m, distance scale error {self.odom_distance_scale_error:+g}, turn scale error "
                f"{self.odom_turn_scale_error:+g}")
        if self.odom_slip_rate_per_m > 0:
            text += (f", slips {self.odom_slip_rate_per_m * 1000:g} per km of up to {self.odom_slip_max_m:g} m and "
                     f"{math.degrees(self.odom_slip_max_rad):g} deg")
        if self.odom_header_factor is None:
            text += "; no odometry_noise header"
        elif self.odom_header_factor != 1.0:
            text += f"; the odometry_noise header understates the random walk {self.odom_header_factor:g} times"
        return text


DEFAULT_OPTIONS = SimOptions()


@dataclass(frozen=True, eq=False)
class Drive:
    """Ground-truth motion sampled at scan times.

    t (N,) seconds; truth (N, 3) poses in the plan frame; step_m (N,) path
    length driven since the previous scan (0 for the first); laps (N,)
    fraction of route rounds completed (1.0 = back at the start once).
    """

    t: np.ndarray
    truth: np.ndarray
    step_m: np.ndarray
    laps: np.ndarray


def _check_options(options: SimOptions) -> None:
    if options.beams < 2:
        raise InputError("simulation needs at least 2 beams")
    positive = ("field_of_view_rad", "scan_period_s", "speed_m_s", "min_speed_m_s", "max_turn_rate_rad_s",
                "lookahead_m", "control_steps_per_scan", "scans_per_block")
    for name in positive:
        if not getattr(options, name) > 0:
            raise InputError(f"simulation option {name} must be positive")
    if not 0 <= options.dropout_probability < 1 or not 0 <= options.burst_probability_per_scan <= 1:
        raise InputError("dropout probabilities must lie in [0, 1)")
    if options.max_range_m is not None and not options.max_range_m > options.min_range_m:
        raise InputError("simulation max_range_m must exceed min_range_m")
    at_least_zero = ("odom_translation_m_per_sqrt_m", "odom_heading_rad_per_sqrt_m", "odom_heading_rad_per_sqrt_rad",
                     "odom_slip_rate_per_m", "odom_slip_max_m", "odom_slip_max_rad")
    for name in at_least_zero:
        if not (math.isfinite(getattr(options, name)) and getattr(options, name) >= 0):
            raise InputError(f"simulation option {name} must be a finite number >= 0")
    for name in ("odom_heading_bias_rad_per_m", "odom_distance_scale_error", "odom_turn_scale_error"):
        if not math.isfinite(getattr(options, name)):
            raise InputError(f"simulation option {name} must be finite")
    # Beyond these the odometry no longer says which way the robot moved or turned.
    if not -0.5 < options.odom_distance_scale_error < 0.5 or not -0.5 < options.odom_turn_scale_error < 0.5:
        raise InputError("simulation odometry scale errors must lie in (-0.5, 0.5)")
    if options.odom_slip_max_rad > math.pi:
        raise InputError("simulation option odom_slip_max_rad must be at most pi")
    f = options.odom_header_factor
    if f is not None and not (math.isfinite(f) and f > 0):
        raise InputError("simulation option odom_header_factor must be None (no header) or a positive number")


def drive(plan: FloorPlan, scans: int | None = None, options: SimOptions = DEFAULT_OPTIONS) -> Drive:
    """Drive the plan's route and sample the true pose at every scan time.

    With ``scans=None`` the drive stops at the first scan after one full
    round of the route (the scenario's natural length); otherwise it goes
    round as often as needed for ``scans`` scans.
    """
    route = floorplans.Polyline(plan.route, closed=True)
    steps = int(options.control_steps_per_scan)
    dt = options.scan_period_s / steps
    look = float(options.lookahead_m)
    v_max, v_min, w_max = options.speed_m_s, options.min_speed_m_s, options.max_turn_rate_rad_s
    carrot_step = min(0.05, look / 10)

    x, y = (float(v) for v in plan.route[0])
    d = plan.route[1] - plan.route[0]
    th = math.atan2(d[1], d[0])
    s_carrot = 0.0
    poses, step_len, laps = [(x, y, th)], [0.0], [0.0]
    travelled = 0.0
    limit = scans if scans is not None else 10 ** 9
    while len(poses) < limit:
        for _ in range(steps):
            # Move the carrot along the route until it is a lookahead away from the robot.
            cx, cy = route.point(s_carrot)
            guard = 0
            while math.hypot(cx - x, cy - y) < look and guard < 10_000:
                s_carrot += carrot_step
                cx, cy = route.point(s_carrot)
                guard += 1
            alpha = math.atan2(cy - y, cx - x) - th
            alpha = math.atan2(math.sin(alpha), math.cos(alpha))
            curvature = 2.0 * math.sin(alpha) / look
            v = v_max if abs(curvature) * v_max <= w_max else max(v_min, w_max / abs(curvature))
            w = max(-w_max, min(w_max, v * curvature))
            # exact unicycle motion over dt (arc of constant v and w)
            if abs(w) > 1e-9:
                x += v / w * (math.sin(th + w * dt) - math.sin(th))
                y -= v / w * (math.cos(th + w * dt) - math.cos(th))
            else:
                x += v * dt * math.cos(th)
                y += v * dt * math.sin(th)
            th = math.atan2(math.sin(th + w * dt), math.cos(th + w * dt))
            travelled += v * dt
        poses.append((x, y, th))
        step_len.append(travelled)
        travelled = 0.0
        laps.append(max(0.0, s_carrot - look) / route.length)
        if scans is None and laps[-1] >= 1.0:
            break
    n = len(poses) if scans is None else scans
    truth = np.asarray(poses[:n], dtype=np.float64)
    truth[:, 2] = se2.wrap(truth[:, 2])
    return Drive(t=np.arange(n) * float(options.scan_period_s), truth=truth,
                 step_m=np.asarray(step_len[:n]), laps=np.asarray(laps[:n]))


def natural_scans(plan: FloorPlan, options: SimOptions = DEFAULT_OPTIONS) -> int:
    """Number of scans in one round of the plan's route."""
    return len(drive(plan, None, options).t)


def _blocks(n: int, size: int):
    for start in range(0, n, size):
        yield start, min(n, start + size)


def _slips(n: int, s: np.ndarray, rng: np.random.Generator, options: SimOptions) -> np.ndarray:
    """Slip jumps (n - 1, 3) added to the increments: mostly zero, a jump where a slip happens."""
    block = int(options.scans_per_block)
    u = np.empty(max(0, n - 1))
    jump = np.empty((max(0, n - 1), 3))
    for start, stop in _blocks(n, block):
        draw_u, draw_j = rng.random(block), rng.random((block, 3))
        lo, hi = max(start, 1), stop
        if hi > lo:
            u[lo - 1:hi - 1] = draw_u[lo - start:hi - start]
            jump[lo - 1:hi - 1] = draw_j[lo - start:hi - start]
    # a Poisson process in distance: at least one slip in a step of s metres with probability 1 - exp(-rate s)
    happens = u < -np.expm1(-options.odom_slip_rate_per_m * s)
    length = options.odom_slip_max_m * jump[:, 0]
    direction = 2.0 * math.pi * jump[:, 1]
    out = np.column_stack([length * np.cos(direction), length * np.sin(direction),
                           options.odom_slip_max_rad * (2.0 * jump[:, 2] - 1.0)])
    out[~happens] = 0.0
    return out


def odometry(truth: np.ndarray, step_m: np.ndarray, rng: np.random.Generator,
             options: SimOptions = DEFAULT_OPTIONS, slip_rng: np.random.Generator | None = None) -> np.ndarray:
    """Odometry poses (N, 3) integrated from noisy increments of the true motion.

    The increment from scan i-1 to i is the true relative pose with, for a
    path length s and rotation r in that step: per-axis positional noise of
    std ``a * sqrt(s)``, heading noise of std ``sqrt(b**2 * s + c**2 * |r|)``,
    a heading bias of ``odom_heading_bias_rad_per_m * s``, a distance scale
    error (on the forward motion), a turn scale error (on r) and, with
    ``odom_slip_rate_per_m > 0``, slips drawn from ``slip_rng`` (required
    then).  The first pose is ``[0, 0, 0]``; ``truth`` (N, 3) is in any
    world frame, ``step_m`` (N,) the path length of each step (metres).

    Examples
    --------
    A 10 m straight with a turn scale error only: turning nothing, it stays exact.

    >>> import numpy as np
    >>> from closurecheck.simulation.simulate import SimOptions, odometry
    >>> truth = np.column_stack([np.linspace(0, 10, 101), np.zeros(101), np.zeros(101)])
    >>> exact = SimOptions(odom_translation_m_per_sqrt_m=0.0, odom_heading_rad_per_sqrt_m=0.0,
    ...                    odom_heading_rad_per_sqrt_rad=0.0, odom_heading_bias_rad_per_m=0.0,
    ...                    odom_distance_scale_error=0.0, odom_turn_scale_error=0.05)
    >>> odom = odometry(truth, np.r_[0.0, np.full(100, 0.1)], np.random.default_rng(0), exact)
    >>> np.round(odom[-1], 9).tolist()
    [10.0, 0.0, 0.0]
    """
    n = len(truth)
    delta = se2.between(truth[:-1], truth[1:])
    s = np.asarray(step_m[1:], dtype=np.float64)
    block = int(options.scans_per_block)
    noise = np.empty((max(0, n - 1), 3))
    for start, stop in _blocks(n, block):
        draw = rng.standard_normal((block, 3))
        # row i of the draw belongs to scan start + i (increments exist from scan 1 on)
        lo, hi = max(start, 1), stop
        if hi > lo:
            noise[lo - 1:hi - 1] = draw[lo - start:hi - start]
    a = options.odom_translation_m_per_sqrt_m
    b = options.odom_heading_rad_per_sqrt_m
    c = options.odom_heading_rad_per_sqrt_rad
    rot = np.abs(delta[:, 2])
    # Multiplying by exactly 1.0 (no turn scale error) leaves the increments bit for bit as before.
    noisy = np.column_stack([
        delta[:, 0] * (1.0 + options.odom_distance_scale_error) + a * np.sqrt(s) * noise[:, 0],
        delta[:, 1] + a * np.sqrt(s) * noise[:, 1],
        delta[:, 2] * (1.0 + options.odom_turn_scale_error) + options.odom_heading_bias_rad_per_m * s
        + np.sqrt(b * b * s + c * c * rot) * noise[:, 2],
    ])
    if options.odom_slip_rate_per_m > 0:
        if slip_rng is None:
            raise InputError("odometry with slips needs a random stream for them (slip_rng)")
        noisy += _slips(n, s, slip_rng, options)
    odom = np.zeros((n, 3))
    px = py = pt = 0.0
    for i, (dx, dy, dth) in enumerate(noisy.tolist(), start=1):
        cos_t, sin_t = math.cos(pt), math.sin(pt)
        px, py = px + cos_t * dx - sin_t * dy, py + sin_t * dx + cos_t * dy
        pt = math.atan2(math.sin(pt + dth), math.cos(pt + dth))
        odom[i] = (px, py, pt)
    return odom


def _mover_shapes(plan: FloorPlan, poses: np.ndarray, times: np.ndarray, robot_radius_m: float):
    """Per-scan shapes of the moving objects: segments (n, 4*carts, 4), circles (n, people, 3).

    An object that would overlap the robot's footprint is left out of that
    scan (people step aside, carts stop short): the sensor never sits inside one.
    """
    n = len(times)
    segs, circs = [], []
    for mover in plan.movers:
        centre, heading = mover.pose_at(times)
        gap = np.hypot(*(centre - poses[:, :2]).T)
        present = gap > mover.extent_m + robot_radius_m
        if mover.kind == "person":
            c = np.column_stack([centre, np.full(n, mover.radius_m)])
            c[~present] = (1e9, 1e9, 0.0)  # far away and of zero size: seen by no beam
            circs.append(c[:, None, :])
        else:
            cos_h, sin_h = np.cos(heading), np.sin(heading)
            hl, hw = mover.length_m / 2, mover.width_m / 2
            corners = [(hl, hw), (-hl, hw), (-hl, -hw), (hl, -hw)]
            pts = np.stack([np.column_stack([centre[:, 0] + cos_h * dx - sin_h * dy,
                                             centre[:, 1] + sin_h * dx + cos_h * dy]) for dx, dy in corners],
                           axis=1)                                    # (n, 4, 2)
            sides = np.concatenate([pts, np.roll(pts, -1, axis=1)], axis=2)
            far = np.full(4, 1e9)  # a degenerate segment far away stands in for an absent cart
            sides[~present] = far
            segs.append(sides)
    seg = np.concatenate(segs, axis=1) if segs else np.zeros((n, 0, 4))
    circ = np.concatenate(circs, axis=1) if circs else np.zeros((n, 0, 3))
    return seg, circ


def render(plan: FloorPlan, poses: np.ndarray, times: np.ndarray, sensor: Sensor,
           options: SimOptions = DEFAULT_OPTIONS, with_movers: bool = True) -> np.ndarray:
    """Noise-free ranges (n, beams) in metres for sensor poses (n, 3) at times (n,) seconds.

    Casts against the static plan and, with ``with_movers``, the moving
    objects where they are at each time.  ``np.inf`` where nothing is hit
    within the sensor's max_range.
    """
    poses = np.asarray(poses, dtype=np.float64).reshape(-1, 3)
    bearings = sensor.bearings()
    ranges = raycast.cast(poses, bearings, plan.segments, plan.circles, max_range=sensor.max_range)
    if with_movers and plan.movers:
        seg, circ = _mover_shapes(plan, poses, np.asarray(times, dtype=np.float64).reshape(-1),
                                  options.robot_radius_m)
        moving = raycast.cast_per_pose(poses, bearings, seg, circ, max_range=sensor.max_range)
        np.minimum(ranges, moving, out=ranges)
    return ranges


def corrupt(clean: np.ndarray, noise_rng: np.random.Generator, dropout_rng: np.random.Generator,
            sensor: Sensor, options: SimOptions = DEFAULT_OPTIONS) -> np.ndarray:
    """Turn noise-free ranges (n, beams) into sensor output (n, beams) float32, NaN = no return.

    Draws exactly one block's worth (``scans_per_block`` rows) from each
    stream whatever n is, so consecutive blocks stay aligned with scan ids.
    """
    n, beams = clean.shape
    block = int(options.scans_per_block)
    noise = noise_rng.standard_normal((block, beams))[:n]
    single = dropout_rng.random((block, beams))[:n] < options.dropout_probability
    burst_on = dropout_rng.random(block)[:n] < options.burst_probability_per_scan
    burst_start = dropout_rng.integers(0, beams, size=block)[:n]
    burst_len = dropout_rng.integers(options.burst_min_beams, options.burst_max_beams + 1, size=block)[:n]
    r = clean + options.range_noise_std_m * noise
    if options.range_resolution_m > 0:
        r = np.round(r / options.range_resolution_m) * options.range_resolution_m
    k = np.arange(beams)
    burst = burst_on[:, None] & (k >= burst_start[:, None]) & (k < (burst_start + burst_len)[:, None])
    lost = single | burst | ~np.isfinite(clean) | (r < sensor.min_range) | (r > sensor.max_range)
    out = r.astype(np.float32)
    out[lost] = np.nan
    return out


def simulate_log(scenario: str, seed: int = 0, scans: int | None = None,
                 options: SimOptions | None = None) -> ScanLog:
    """Simulate a scan log of an invented scenario.

    Parameters
    ----------
    scenario : a key of :data:`SCENARIOS` ("warehouse", "ring", "yard", "hall", "lot").
    seed : random seed; the same seed and options give the same log.
    scans : number of scans; None drives one round of the scenario's route.
    options : robot, sensor and noise settings (:class:`SimOptions`).

    Returns a :class:`ScanLog` with odometry (starting at ``[0, 0, 0]``),
    ranges (metres, NaN = no return) and ``truth`` poses in the plan frame,
    with ``odometry_noise`` and ``notes`` in its header.
    """
    if scenario not in SCENARIOS:
        raise InputError(f"unknown scenario {scenario!r} (choose from {', '.join(sorted(SCENARIOS))})")
    if scans is not None and (int(scans) != scans or scans < 1):
        raise InputError(f"number of scans must be a positive integer, got {scans!r}")
    if isinstance(seed, bool) or int(seed) != seed or seed < 0:
        raise InputError(f"seed must be a non-negative integer, got {seed!r}")
    options = options or DEFAULT_OPTIONS
    _check_options(options)
    plan = SCENARIOS[scenario]()
    sensor = options.sensor(plan)
    motion = drive(plan, None if scans is None else int(scans), options)
    n = len(motion.t)

    # The fourth stream (slips) was added later: spawning it leaves the first three as they were.
    odom_rng, noise_rng, dropout_rng, slip_rng = (
        np.random.default_rng(s) for s in np.random.SeedSequence(int(seed)).spawn(4))
    odom = odometry(motion.truth, motion.step_m, odom_rng, options, slip_rng)
    ranges = np.empty((n, sensor.beams), dtype=np.float32)
    for start, stop in _blocks(n, int(options.scans_per_block)):
        clean = render(plan, motion.truth[start:stop], motion.t[start:stop], sensor, options)
        ranges[start:stop] = corrupt(clean, noise_rng, dropout_rng, sensor, options)

    distance = float(motion.step_m.sum())
    notes = (f"simulated '{scenario}' scenario (invented place: {plan.description}); seed {int(seed)}; "
             f"{n} scans at {1.0 / options.scan_period_s:g} Hz over {distance:.0f} m at up to "
             f"{options.speed_m_s:g} m/s; {sensor.beams} beams over "
             f"{math.degrees(options.field_of_view_rad):g} deg, range noise std {options.range_noise_std_m:g} m; "
             "odom starts at [0, 0, 0], truth is in the floor plan frame")
    errors = options.odometry_errors_note()
    if errors:
        notes += f"; {errors}"
    header = {"notes": notes}
    noise = options.odometry_noise_header()
    if noise is not None:
        header["odometry_noise"] = noise
    return make_scanlog(sensor, motion.t, odom, ranges, truth=motion.truth, header=header,
                        source=f"simulated-{scenario}-seed{int(seed)}")


def odometry_drift(log: ScanLog) -> np.ndarray:
    """Position error (N,) in metres of odometry against truth, both anchored at the first scan."""
    if log.truth is None:
        raise InputError("the log has no truth poses")
    aligned = se2.compose(log.truth[0], se2.between(log.odom[0], log.odom))
    return np.hypot(*(aligned[:, :2] - log.truth[:, :2]).T)
