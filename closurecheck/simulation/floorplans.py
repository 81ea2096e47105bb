"""Invented floor plans for the scenario generator.

Every plan is our own invention (no real site): static walls and racks as
line segments, pillars and poles as circles, a closed route of waypoints the
robot drives around forever, and a few moving objects (people as circles,
carts as small rectangles).  Coordinates are metres in the plan's own world
frame, x east, y north.

The plans are built to exercise loop-closure verification: each has places
that look alike (identical aisles, identical side rooms, identical container
blocks), a few features that tell them apart, and a route that revisits
places in both directions.  Two plans go further: in ``hall`` nothing tells
the places apart (a regular grid of identical columns, the walls out of
range), and in ``lot`` a few small objects are all there is to see.
"""

from __future__ import annotations

import bisect
import math
from dataclasses import dataclass, field

import numpy as np

# --------------------------------------------------------------------------- paths


class Polyline:
    """A path through waypoints (K, 2) in metres, parametrised by arc length.

    ``closed`` paths continue from the last waypoint back to the first and
    repeat forever; open paths are walked back and forth (ping-pong) when
    asked for a position past their end.
    """

    def __init__(self, points, closed: bool):
        pts = np.asarray(points, dtype=np.float64).reshape(-1, 2)
        if closed:
            pts = np.vstack([pts, pts[:1]])
        self.points = pts
        self.closed = closed
        seg = np.diff(pts, axis=0)
        self.lengths = np.hypot(seg[:, 0], seg[:, 1])
        self.cumulative = np.concatenate([[0.0], np.cumsum(self.lengths)])
        self.length = float(self.cumulative[-1])
        self._cum = self.cumulative.tolist()
        self._pts = pts.tolist()

    def _fold(self, s):
        """Map an unbounded arc length to [0, length] (wrap or ping-pong) and a direction sign."""
        s = np.asarray(s, dtype=np.float64)
        if self.closed:
            return np.mod(s, self.length), np.ones_like(s)
        period = 2.0 * self.length
        u = np.mod(s, period)
        back = u > self.length
        return np.where(back, period - u, u), np.where(back, -1.0, 1.0)

    def at(self, s):
        """Points (..., 2) and headings (...,) (radians, direction of travel) at arc lengths s."""
        u, sign = self._fold(s)
        k = np.clip(np.searchsorted(self.cumulative, u, side="right") - 1, 0, len(self.lengths) - 1)
        frac = (u - self.cumulative[k]) / np.where(self.lengths[k] > 0, self.lengths[k], 1.0)
        a, b = self.points[k], self.points[k + 1]
        xy = a + frac[..., None] * (b - a)
        d = (b - a) * sign[..., None]
        return xy, np.arctan2(d[..., 1], d[..., 0])

    def point(self, s: float) -> tuple[float, float]:
        """One point at arc length s on a closed path (scalar fast path for the route follower)."""
        u = s % self.length
        k = min(bisect.bisect_right(self._cum, u) - 1, len(self._cum) - 2)
        seg = self._cum[k + 1] - self._cum[k]
        f = (u - self._cum[k]) / seg if seg > 0 else 0.0
        (ax, ay), (bx, by) = self._pts[k], self._pts[k + 1]
        return ax + f * (bx - ax), ay + f * (by - ay)


# --------------------------------------------------------------------------- plan types


@dataclass(frozen=True, eq=False)
class Mover:
    """A moving object: a person (circle) or a cart (rectangle) walking its own path.

    ``path`` (K, 2) metres; ``closed`` loops it, otherwise it goes back and
    forth.  The object is at arc length ``start_m + speed_m_s * t`` at time t
    (seconds).  Carts are ``length_m`` x ``width_m`` rectangles aligned with
    their direction of travel; people are circles of ``radius_m``.
    """

    name: str
    kind: str
    path: np.ndarray
    speed_m_s: float
    closed: bool = False
    start_m: float = 0.0
    radius_m: float = 0.25
    length_m: float = 1.2
    width_m: float = 0.7
    _line: Polyline = field(init=False, repr=False)

    def __post_init__(self):
        if self.kind not in ("person", "cart"):
            raise ValueError(f"unknown mover kind {self.kind!r}")
        object.__setattr__(self, "_line", Polyline(self.path, self.closed))

    def pose_at(self, t) -> tuple[np.ndarray, np.ndarray]:
        """Centre (T, 2) metres and heading (T,) radians at times t (T,) seconds."""
        return self._line.at(self.start_m + self.speed_m_s * np.asarray(t, dtype=np.float64))

    @property
    def extent_m(self) -> float:
        """Radius of a circle around the centre that holds the whole object."""
        return self.radius_m if self.kind == "person" else 0.5 * math.hypot(self.length_m, self.width_m)


@dataclass(frozen=True, eq=False)
class FloorPlan:
    """An invented place to drive through.

    segments : (S, 4) static walls ``[x0, y0, x1, y1]`` (metres, world frame).
    circles : (C, 3) static pillars and poles ``[cx, cy, r]``.
    route : (K, 2) waypoints of a closed route; the robot starts at
        ``route[0]`` facing ``route[1]`` and after the last waypoint drives
        back to the first and round again, so the route never ends.  One
        round is the scenario's natural length.
    movers : moving objects.
    max_range_m : the sensor range that suits the place.
    """

    name: str
    description: str
    segments: np.ndarray
    circles: np.ndarray
    route: np.ndarray
    movers: tuple = ()
    max_range_m: float = 20.0


# --------------------------------------------------------------------------- drawing helpers


def _chain(*points, closed=False) -> list:
    """Segments joining consecutive points (a wall drawn without lifting the pen)."""
    pts = list(points) + ([points[0]] if closed else [])
    return [(a[0], a[1], b[0], b[1]) for a, b in zip(pts[:-1], pts[1:])]


def _rect(x0, y0, x1, y1) -> list:
    return _chain((x0, y0), (x1, y0), (x1, y1), (x0, y1), closed=True)


def _rotated_rect(cx, cy, length, width, angle) -> list:
    c, s = math.cos(angle), math.sin(angle)
    hl, hw = length / 2, width / 2
    corners = [(cx + c * dx - s * dy, cy + s * dx + c * dy)
               for dx, dy in ((hl, hw), (-hl, hw), (-hl, -hw), (hl, -hw))]
    return _chain(*corners, closed=True)


def _summary(builder) -> str:
    """First line of a builder's docstring, without the full stop: the plan's one-line description."""
    return builder.__doc__.strip().split("\n")[0].strip().rstrip(".")


def _plan(name, description, segments, circles, route, movers, max_range_m) -> FloorPlan:
    return FloorPlan(
        name=name,
        description=description,
        segments=np.asarray(segments, dtype=np.float64).reshape(-1, 4),
        circles=np.asarray(circles, dtype=np.float64).reshape(-1, 3),
        route=np.asarray(route, dtype=np.float64).reshape(-1, 2),
        movers=tuple(movers),
        max_range_m=float(max_range_m),
    )


# --------------------------------------------------------------------------- warehouse


# Racking layout: six identical double-sided rack rows, 1.4 m deep, with
# 3.2 m aisles; nine 2.67 m bays per face, bays 1 and 5 empty on every face
# (so all five aisles look the same, but an aisle driven north does not look
# like one driven south).
_RACK_ROWS = 6
_RACK_X0 = 6.0
_RACK_DEPTH = 1.4
_AISLE_WIDTH = 3.2
_RACK_Y0, _RACK_Y1 = 8.0, 32.0
_BAYS = 9
_EMPTY_BAYS = (1, 5)


def _rack_row(x0: float) -> list:
    """Outline of one rack row whose west face is at x0; empty bays are recesses to the row's centre line."""
    x1 = x0 + _RACK_DEPTH
    xm = x0 + _RACK_DEPTH / 2
    bay = (_RACK_Y1 - _RACK_Y0) / _BAYS
    segs = [(x0, _RACK_Y0, x1, _RACK_Y0), (x0, _RACK_Y1, x1, _RACK_Y1)]
    for face, inner in ((x0, xm), (x1, xm)):
        pts = [(face, _RACK_Y0)]
        for b in _EMPTY_BAYS:
            ya, yb = _RACK_Y0 + b * bay, _RACK_Y0 + (b + 1) * bay
            pts += [(face, ya), (inner, ya), (inner, yb), (face, yb)]
        pts.append((face, _RACK_Y1))
        segs += _chain(*pts)
    return segs


def warehouse() -> FloorPlan:
    """A 44 m x 38 m racking warehouse with five look-alike aisles.

    Features that break the symmetry: a loading dock with three doors (the
    middle one open) in the south-east, an office in the north-west corner
    with a desk seen through its door, pallet stacks in the west and east
    staging areas, and four building pillars.
    """
    segs: list = []
    # South wall with the loading dock: three 3 m door recesses, the middle one open to the outside.
    segs += _chain((0, 38), (0, 0), (30, 0), (30, -1), (33, -1), (33, 0), (34.5, 0), (34.5, -1))
    segs += _chain((37.5, -1), (37.5, 0), (39, 0), (39, -1), (42, -1), (42, 0), (44, 0), (44, 38), (0, 38))
    for i in range(_RACK_ROWS):
        segs += _rack_row(_RACK_X0 + i * (_RACK_DEPTH + _AISLE_WIDTH))
    # Office in the north-west corner with a door onto the north cross aisle and a desk inside.
    segs += _chain((0, 26), (5, 26), (5, 33.5))
    segs += _chain((5, 35.0), (5, 38))
    segs += _rect(1.5, 33.0, 3.0, 34.6)
    # Staging areas: pallet stacks by the west wall and in the east bay, a charger box.
    segs += _rect(1.0, 10.0, 2.2, 11.2) + _rect(1.0, 14.0, 2.2, 15.2) + _rect(0.0, 20.0, 0.8, 21.5)
    segs += _rect(40.0, 10.0, 42.4, 11.2) + _rect(40.0, 14.0, 42.4, 15.2) + _rect(40.0, 22.0, 41.2, 23.2)
    circles = [(20.5, 36.6, 0.3), (11.3, 6.2, 0.3), (36.0, 14.0, 0.3), (36.0, 26.0, 0.3)]

    xa = [_RACK_X0 + _RACK_DEPTH + _AISLE_WIDTH / 2 + i * (_RACK_DEPTH + _AISLE_WIDTH) for i in range(5)]
    ys, yn = 4.0, 35.0
    apron_turn = [(40.0, ys), (42.0, 5.0), (41.5, 7.0), (39.5, 7.0)]
    # Round A: west along the south cross aisle, aisles up/down/up/down/up, east bay southwards,
    # turn, east bay northwards; round B: aisles down/up/down/up/down, turn on the dock apron;
    # round C: aisles 4 and 5 (counting from the west) up and down again as in round B, turn on the apron.
    route = [(38.0, ys)]
    for i, x in enumerate(xa):
        route += [(x, ys), (x, yn)] if i % 2 == 0 else [(x, yn), (x, ys)]
    route += [(38.0, yn), (38.0, 9.0), (37.0, 7.0), (35.0, 7.0), (34.0, 9.0), (34.0, yn)]
    for i, x in enumerate(xa):
        route += [(x, yn), (x, ys)] if i % 2 == 0 else [(x, ys), (x, yn)]
    route += apron_turn
    route += [(xa[3], ys), (xa[3], yn), (xa[4], yn), (xa[4], ys)] + apron_turn

    movers = [
        Mover("walker in the north cross aisle", "person", np.array([(12.0, 33.4), (30.0, 33.4)]), 1.2),
        Mover("picker in aisle 3", "person", np.array([(xa[2] + 0.8, 10.0), (xa[2] + 0.8, 30.0)]), 0.9,
              start_m=7.0),
        Mover("tugger cart in the south cross aisle", "cart", np.array([(13.0, 6.6), (36.0, 6.6)]), 1.5,
              start_m=10.0, length_m=2.2, width_m=1.1),
    ]
    return _plan("warehouse", _summary(warehouse), segs, circles, route, movers, 20.0)


# --------------------------------------------------------------------------- ring corridor


def ring() -> FloorPlan:
    """An office floor: a rectangular ring corridor with twelve identical side rooms.

    The corridor (2.4 m wide, 126 m round) has six identical rooms on its
    north side and six on its south side, each with the same table.  A lift
    alcove on the west and an entrance hall with pillars, a desk and a glass
    door on the east tell the ends apart.
    """
    segs: list = []
    room_x = [9.0, 15.0, 21.0, 27.0, 33.0, 39.0]
    room_w, room_d, door_w = 5.0, 5.0, 1.2

    def corridor_wall(y, y_back, lo, hi):
        """Outer corridor wall at height y from x=lo to x=hi with a door into each room."""
        out, x = [], lo
        for rx in room_x:
            d0 = rx + (room_w - door_w) / 2
            out.append((x, y, d0, y))
            x = d0 + door_w
            out += _chain((rx, y), (rx, y_back), (rx + room_w, y_back), (rx + room_w, y))
            # the same table in every room, placed the same way relative to its door
            ty = y + (y_back - y) * 0.55
            out += _rect(rx + 0.8, min(ty, ty + 0.8 * np.sign(y_back - y)), rx + 2.4,
                         max(ty, ty + 0.8 * np.sign(y_back - y)))
        out.append((x, y, hi, y))
        return out

    segs += corridor_wall(28.0, 28.0 + room_d, 4.0, 48.0)
    segs += corridor_wall(4.0, 4.0 - room_d, 4.0, 48.0)
    # Inner block of the ring.
    segs += _rect(6.4, 6.4, 45.6, 25.6)
    # West wall with the lift alcove (two lift door recesses).
    segs += _chain((4, 4), (4, 12), (0, 12), (0, 13), (-0.3, 13), (-0.3, 15), (0, 15), (0, 17),
                   (-0.3, 17), (-0.3, 19), (0, 19), (0, 20), (4, 20), (4, 28))
    segs += _rect(1.0, 19.2, 2.8, 19.6)  # bench
    # East entrance hall: glass door (invisible to the sensor) in the east wall between y=14 and 18.
    segs += [(48, 4, 48, 8), (48, 24, 48, 28)]
    segs += _chain((48, 6), (60, 6), (60, 14))
    segs += _chain((60, 18), (60, 26), (48, 26))
    segs += _rect(56.0, 21.5, 58.5, 22.5)  # reception desk
    circles = [(53.0, 11.0, 0.35), (53.0, 21.0, 0.35), (58.5, 8.0, 0.5)]

    se, sw, nw, ne = (46.8, 5.2), (5.2, 5.2), (5.2, 26.8), (46.8, 26.8)
    cw = [se, sw, nw, ne]
    ccw = [ne, nw, sw, se]
    route = [(46.8, 9.0)] + cw + cw
    # Turn round in the hall: a loop out through the hall and back into the corridor.
    route += [(46.8, 21.0), (48.2, 17.0), (50.5, 13.5), (53.0, 16.0), (52.0, 19.0), (49.5, 20.5), (46.8, 23.5)]
    route += ccw + ccw
    route += [(46.8, 11.0), (48.2, 15.0), (50.5, 18.5), (53.0, 16.0), (52.0, 13.0), (49.5, 11.5)]

    movers = [
        Mover("colleague walking anticlockwise", "person",
              np.array([(46.2, 5.8), (46.2, 26.2), (5.8, 26.2), (5.8, 5.8)]), 1.3, closed=True, start_m=20.0),
        Mover("colleague walking clockwise", "person",
              np.array([(4.6, 4.6), (4.6, 27.4), (47.4, 27.4), (47.4, 4.6)]), 1.1, closed=True, start_m=70.0),
        Mover("trolley in the hall", "cart", np.array([(57.5, 9.0), (57.5, 19.0)]), 0.8,
              length_m=1.2, width_m=0.7),
    ]
    return _plan("ring", _summary(ring), segs, circles, route, movers, 20.0)


# --------------------------------------------------------------------------- yard


def yard() -> FloorPlan:
    """An open storage yard: fences, a building edge, two identical container blocks, poles.

    The two blocks of three 12.2 m containers look the same; a single
    container lying at an angle, a parked trailer, a lone short container,
    the building's step and its roller doors, the gate and the light poles
    tell the halves apart.  Ranges are long and many beams see nothing.
    """
    segs: list = []
    # Fence on three sides (gate gap in the south fence) and east of the building.
    segs += _chain((0, 56), (0, 0), (40, 0))
    segs += _chain((46, 0), (90, 0), (90, 60), (62, 60))
    posts = [(x, 0.0) for x in range(6, 90, 6) if not 40 <= x <= 46]
    posts += [(0.0, y) for y in range(6, 56, 6)] + [(90.0, y) for y in range(6, 60, 6)]
    # Building front with two roller-door recesses and a step back at x=40.
    segs += _chain((0, 56), (10, 56), (10, 56.4), (14, 56.4), (14, 56), (24, 56), (24, 56.4), (28, 56.4),
                   (28, 56), (40, 56), (40, 60), (62, 60))
    # Two identical blocks of three containers (12.2 m x 2.44 m, 0.56 m apart).
    for bx in (20.0, 50.0):
        for k in range(3):
            y0 = 20.0 + k * 3.0
            segs += _rect(bx, y0, bx + 12.2, y0 + 2.44)
    segs += _rect(40.0, 40.0, 46.1, 42.44)                # lone short container
    segs += _rotated_rect(71.0, 24.0, 6.1, 2.44, math.radians(35.0))
    segs += _rect(58.0, 40.0, 71.6, 42.5)                 # parked trailer
    circles = [(x, y, 0.06) for x, y in posts]
    circles += [(35.0, 10.0, 0.15), (70.0, 12.0, 0.15), (15.0, 45.0, 0.15), (55.0, 45.0, 0.15),
                (82.0, 48.0, 0.15)]
    circles += [(x, 54.5, 0.1) for x in (9.0, 15.0, 23.0, 29.0)]

    a_ccw = [(36.0, 32.5), (16.0, 32.5), (16.0, 16.0), (36.0, 16.0), (41.0, 24.0)]
    b_cw = [(46.0, 32.5), (66.0, 32.5), (66.0, 16.0), (46.0, 16.0), (41.0, 24.0)]
    b_ccw = [(46.0, 16.0), (66.0, 16.0), (66.0, 32.5), (46.0, 32.5), (41.0, 24.0)]
    a_cw = [(36.0, 16.0), (16.0, 16.0), (16.0, 32.5), (36.0, 32.5), (41.0, 24.0)]
    # A big anticlockwise loop round everything, then figure eights: A anticlockwise, B clockwise,
    # A anticlockwise, then the other way round: B anticlockwise, A clockwise.
    route = [(46.0, 16.0), (52.0, 8.5), (76.0, 8.0), (76.0, 48.0), (10.0, 48.0), (10.0, 36.0), (16.0, 30.0),
             (16.0, 16.0), (36.0, 16.0), (41.0, 24.0)]
    route += b_cw + a_ccw + b_ccw + a_cw

    movers = [
        Mover("truck on the east lane", "cart", np.array([(84.0, 6.0), (84.0, 54.0)]), 2.5,
              length_m=7.0, width_m=2.5),
        Mover("worker crossing to the building", "person", np.array([(12.0, 53.0), (30.0, 40.0)]), 1.2),
        Mover("worker by the lone container", "person", np.array([(18.0, 44.0), (38.0, 44.0)]), 1.3,
              start_m=5.0),
    ]
    return _plan("yard", _summary(yard), segs, circles, route, movers, 30.0)


# --------------------------------------------------------------------------- hall and lot


def _loop_both_ways(x0, y0, x1, y1, step) -> list:
    """Route round the rectangle (x0, y0)-(x1, y1): twice anticlockwise, then twice clockwise.

    Each change of direction is a small clockwise loop of side ``step``
    south-west of the corner (x0, y0), where the route starts facing east.
    """
    ccw = [(x0, y0), (x1, y0), (x1, y1), (x0, y1)]
    cw = [(x0, y0), (x0, y1), (x1, y1), (x1, y0)]
    turn_to_cw = [(x0, y0), (x0, y0 - step), (x0 - step, y0 - step), (x0 - step, y0)]
    turn_to_ccw = [(x0, y0), (x0 - step, y0), (x0 - step, y0 + step), (x0, y0 + step)]
    return ccw + ccw + turn_to_cw + cw + cw + turn_to_ccw


HALL_PITCH_M = 6.0


def hall() -> FloorPlan:
    """An empty exhibition hall: a regular grid of identical round columns, 6 m apart both ways.

    The hall is 102 m x 78 m and the route keeps 27 m or more from its
    walls, beyond the sensor's 20 m: within range there are only the columns
    (0.5 m across), and every place looks like every other one a whole
    number of column pitches away, and like itself turned by 90 degrees.
    The route drives the lanes between the columns round a 30 m x 18 m block,
    twice each way.
    """
    segs = _rect(0.0, 0.0, 102.0, 78.0)
    circles = [(HALL_PITCH_M * i, HALL_PITCH_M * j, 0.25) for i in range(1, 17) for j in range(1, 13)]
    half = HALL_PITCH_M / 2
    route = _loop_both_ways(39.0, 33.0, 69.0, 51.0, HALL_PITCH_M)
    movers = [
        Mover("visitor walking down a lane", "person", np.array([(57.0 + half, 20.0), (57.0 + half, 60.0)]), 1.1),
    ]
    return _plan("hall", _summary(hall), segs, circles, route, movers, 20.0)


def lot() -> FloorPlan:
    """An open car park: a few lamp posts, two containers, a kiosk and bollards, the fence mostly out of range.

    The lot is 110 m x 75 m; the route goes round a 36 m x 24 m loop in its
    middle, twice each way, 19 m or more from the fence.  Most of the time
    a handful of small objects, irregularly placed, is all the 20 m sensor
    sees; the containers (one square to the lanes, one at an angle) and the
    kiosk are the only large shapes.
    """
    segs = _rect(0.0, 0.0, 110.0, 75.0)
    segs += _rect(50.0, 35.8, 56.1, 38.2)                       # container inside the loop
    segs += _rotated_rect(81.0, 40.0, 6.1, 2.44, math.radians(20.0))  # container east of the loop, at an angle
    segs += _rect(42.0, 14.0, 45.0, 16.5)                       # kiosk south of the loop
    lamps = [(44.0, 29.0), (62.0, 45.0), (76.0, 21.0), (30.0, 40.0), (58.0, 55.0), (40.0, 55.0),
             (66.0, 31.0), (24.0, 22.0), (51.0, 20.0), (79.0, 53.0)]
    circles = [(x, y, 0.15) for x, y in lamps] + [(47.0, 18.0, 0.1), (48.5, 18.0, 0.1), (87.0, 30.0, 0.1)]
    route = _loop_both_ways(35.0, 25.0, 71.0, 49.0, 6.0)
    movers = [
        Mover("person walking to the kiosk", "person", np.array([(60.0, 60.0), (46.0, 19.5)]), 1.2),
        Mover("van crossing the lot", "cart", np.array([(90.0, 10.0), (90.0, 65.0)]), 3.0,
              length_m=5.0, width_m=2.0),
    ]
    return _plan("lot", _summary(lot), segs, circles, route, movers, 20.0)


FLOORPLANS = {"warehouse": warehouse, "ring": ring, "yard": yard, "hall": hall, "lot": lot}
