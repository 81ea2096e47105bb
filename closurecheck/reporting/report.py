"""The run report: a self-contained report.html with zoomable maps, scan overlays and embedded PNG pictures.

The pictures are also written beside it (``figures/*.png``, including static
versions of the maps).  Everything the page needs is inside the file (no
scripts, styles or fonts from the network), so it opens in any browser
offline and can be mailed to a colleague.  The maps and the overlay of two
scans are drawn by the page's own script from the keyframe scans it
carries (:mod:`closurecheck.reporting.report_script`).

The page reads top to bottom in the order a reviewer asks questions: is the
run trustworthy at a glance (counts, scores, notes), does the map look right
(odometry-only next to optimised), where are the closures and the rejected
candidates, which verdicts were close calls (with the two scans laid over
each other), how did each check split them, and finally every candidate in
a sortable table; any candidate opens its overlay, and accept / reject
buttons write rows for ``closurecheck run --decisions``.
"""

from __future__ import annotations

import base64
import dataclasses
import functools
import gc
import html
import io
import json
import math
import re
from dataclasses import dataclass, field
from pathlib import Path
from typing import TYPE_CHECKING

import numpy as np

from ..core import se2
from ..io.atomic import write_bytes, write_text
from ..verification.reasons import GROUPS, Reason
from ..verification.verdicts import VerdictTable
from .references import REFERENCE_NOTE, REFERENCE_VERDICTS
from .report_script import VIEWER_CSS, VIEWER_JS

# margins and scoring (and free_space) import scipy, about 2 s in a fresh
# process; the picture worker (closurecheck.reporting.picture_worker)
# imports this module without them, so they are imported where used.
if TYPE_CHECKING:
    from ..verification.free_space import FreeSpaceCheck
    from ..verification.margins import Margins

SAFETY_TEXT = (
    "Verified loop closures are statistical decisions, not guarantees: a closure that passed every "
    "check can still be wrong, and a wrong map can make a robot collide. Validate every map before "
    "robots drive near people, and defer to the applicable safety standards and the site's own rules."
)

ACCEPT_COLOUR = "#1a9850"
REJECT_COLOUR = "#d73027"
ODOM_COLOUR = "#7f7f7f"
MAP_COLOUR = "#2c3e50"
TRUTH_COLOUR = "#e08e0b"
TRAJECTORY_COLOUR = "#3182bd"
ELLIPSE_COLOUR = "#54278f"

# Rejected candidates grouped by the stage that stopped them, lightest for
# the everyday "scans do not match" and strongest for pairs that matched well
# but contradict the rest of the graph (the look-alike places).
# Colour and legend of each report group of rejections (the groups of
# closurecheck.verification.reasons, in their order).
REJECT_STYLE = {
    "registration": ("#f4a582", "rejected by registration quality"),
    "odometry": (REJECT_COLOUR, "rejected by the odometry gate"),
    "consistency": ("#c51b7d", "rejected by consistency or graph checks"),
    "reviewer": ("#4d4d4d", "rejected by a reviewer's decision"),
}
# The two scans of an overlay: the candidate's "from" scan and its "to" scan.
SCAN_FROM_COLOUR = "#1f63b4"
SCAN_TO_COLOUR = "#e6550d"
# Close calls listed per side (the accepted with the least margin, the rejected with the most).
CLOSE_CALLS = 8

HISTOGRAM_FIGURES = (
    ("overlap", "overlap (fraction of points matched)"),
    ("rmse_m", "registration RMSE (m)"),
    ("ambiguity", "ambiguity (second-best / best fit score)"),
    ("odometry_chi2", "odometry gate, squared Mahalanobis distance"),
    ("pair_support", "consistent partners (PCM degree)"),
    ("graph_chi2", "residual after optimisation, squared Mahalanobis distance"),
)

# Legend text of each figure's bound on its histogram.
THRESHOLD_LABEL = {
    "overlap": "pass: at least {:.3g}",
    "rmse_m": "pass: at most {:.3g}",
    "ambiguity": "pass: at most {:.3g}",
    # Closures beyond the strict gate can still be verified later, against
    # the map the first closures pin down (and with the odometry variance
    # factor), so this bound is not the last word.
    "odometry_chi2": "strict gate {:.3g} (first pass)",
    "map_chi2": "pass: at most {:.3g}",
    "graph_chi2": "pass: at most {:.3g}",
}


# The map pictures draw every third point of each scan: the walls stay continuous at the pictures'
# scale, and the 100,000-scan log's 33,333 keyframes hold about 370 MB of points.
MAP_STRIDE = 3


@dataclass(frozen=True, eq=False)
class ReportData:
    """What the report shows; all poses (K, 3) in metres/radians.

    ``ids`` are the keyframe scan ids in node order; ``odom`` their odometry
    poses and ``poses`` the optimised ones (one fixed frame each);
    ``scan_points`` the keyframes' valid returns (N_k, 2) in the robot frame
    (m), of which the map pictures draw every ``map_stride``-th (a picture
    worker is sent only those, with ``map_stride`` 1); ``truth`` (K, 3) or None.  ``thresholds`` maps a check figure's
    name to the bound the verification used (same units as the figure;
    :func:`check_thresholds`), drawn on its histogram.
    """

    log_name: str
    ids: np.ndarray
    odom: np.ndarray
    poses: np.ndarray
    scan_points: list
    verdicts: VerdictTable
    summary: list = field(default_factory=list)  # (label, value) rows
    timings: dict = field(default_factory=dict)  # stage -> seconds
    score: dict | None = None
    truth: np.ndarray | None = None
    config_text: str = ""
    notes: list = field(default_factory=list)
    thresholds: dict = field(default_factory=dict)
    trust: str = ""  # "sound" or "doubtful"; "" when the run did not judge itself
    trust_reasons: tuple = ()
    free_space: FreeSpaceCheck | None = None
    map_stride: int = MAP_STRIDE


def check_thresholds(verify_options) -> dict:
    """Bounds of the verification checks by figure name, for the histograms and the margins.

    :func:`closurecheck.verification.margins.check_bounds` (the one home of
    the rule): the chi-square figures get the quantile of chi-square with 3
    degrees of freedom at the configured probability.
    """
    from ..verification.margins import check_bounds

    return check_bounds(verify_options)


# Blank canvas (inches) around each figure's nominal area: labels, legends
# and titles that outgrow their margins land on it instead of being cut off,
# and _png crops it away again.
_SLACK_IN = 1.0
# Blank border (pixels) kept around the drawn content, as savefig's
# bbox_inches="tight" keeps its default pad_inches=0.1 at 100 dpi.
_PAD_PX = 10
# zlib level of the PNGs.  Measured on the 5,000-scan warehouse log's six
# pictures: level 6 (Pillow's default) 0.18 s to encode, level 1 0.11 s, the
# files 8% larger (765 kB against 708 kB).
_PNG_LEVEL = 1

# Titles sit at the top of their axes (plus matplotlib's title pad).  Left to
# itself (y unset) matplotlib places each title at draw time, measuring the
# tick labels of the y axis to dodge an offset text ("1e6") none of these
# pictures has: a second layout of every y tick label.
_TITLE_Y = 1.0


def _figure(width: float, height: float, rows: int = 1, cols: int = 1, *, left: float = 0.8,
            right: float = 0.2, bottom: float = 0.6, top: float = 0.4, wgap: float = 0.8, hgap: float = 0.8,
            **subplot_kw):
    """A figure and its (rows, cols) axes with fixed margins and gaps in inches, for one draw.

    The axes fill ``width`` x ``height`` inches less the margins; the
    layout is set here instead of by tight_layout (or savefig's
    bbox_inches="tight"), each of which draws the whole figure once more
    to measure it: on the 5,000-scan warehouse log the six pictures took
    3.5 s with both and 2.3 s drawn once (wall time, load average 2.3 on
    2 cores).  No pyplot: the figure is not registered with a window
    manager, so nothing needs closing.
    """
    import matplotlib
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    # The pictures draw on their own Agg canvases (no pyplot); Agg is still
    # chosen for anything in this process that uses pyplot: no window
    # system, no GUI event loop or threads that could outlive an
    # interrupted run.
    matplotlib.use("Agg", force=False)
    full_w, full_h = width + 2 * _SLACK_IN, height + 2 * _SLACK_IN
    fig = Figure(figsize=(full_w, full_h), dpi=100)
    FigureCanvasAgg(fig)
    ax_w = (width - left - right - (cols - 1) * wgap) / cols
    ax_h = (height - top - bottom - (rows - 1) * hgap) / rows
    grid = {"left": (_SLACK_IN + left) / full_w, "right": 1.0 - (_SLACK_IN + right) / full_w,
            "bottom": (_SLACK_IN + bottom) / full_h, "top": 1.0 - (_SLACK_IN + top) / full_h,
            "wspace": wgap / ax_w, "hspace": hgap / ax_h}
    axes = fig.subplots(rows, cols, squeeze=False, gridspec_kw=grid, **subplot_kw)
    return fig, axes


def _png(fig) -> bytes:
    """Draw ``fig`` once and encode it as PNG, cropped to its content plus a pad of ``_PAD_PX``."""
    from PIL import Image

    fig.canvas.draw()
    rgba = np.asarray(fig.canvas.buffer_rgba())
    face = np.array([round(255 * c) for c in fig.get_facecolor()], dtype=np.uint8)
    # One 32-bit comparison per pixel instead of four 8-bit ones.
    ink = np.ascontiguousarray(rgba).view(np.uint32)[..., 0] != face.view(np.uint32)[0]
    rows, cols = np.flatnonzero(ink.any(axis=1)), np.flatnonzero(ink.any(axis=0))
    if len(rows):
        y0, y1 = max(rows[0] - _PAD_PX, 0), min(rows[-1] + 1 + _PAD_PX, rgba.shape[0])
        x0, x1 = max(cols[0] - _PAD_PX, 0), min(cols[-1] + 1 + _PAD_PX, rgba.shape[1])
        rgba = rgba[y0:y1, x0:x1]
    buf = io.BytesIO()
    # The figure is opaque: RGB is a quarter less to compress than RGBA.  No
    # text chunks (Pillow writes none unless asked), so the PNGs do not
    # depend on the library versions; pHYs says 100 dpi as savefig did.
    Image.fromarray(np.ascontiguousarray(rgba[..., :3])).save(buf, format="png", dpi=(100, 100),
                                                              compress_level=_PNG_LEVEL)
    return buf.getvalue()


_SUPERSCRIPT = str.maketrans("-0123456789", "\u207b\u2070\u00b9\u00b2\u00b3\u2074\u2075\u2076\u2077\u2078\u2079")
_MATH_POWER = re.compile(r"\^\{([^{}]*)\}")


def plain_math(label: str) -> str:
    r"""A log axis' tick label as plain text: exponents as Unicode superscripts, ``\times`` as a times sign.

    matplotlib labels log axes in mathtext (``$\mathdefault{10^{-2}}$``),
    and parsing it cost about 0.2 s of the report's pictures at 5,000
    scans; the plain text needs no parser and reads the same.  Labels that
    are not mathtext come back unchanged.

    Examples
    --------
    >>> from closurecheck.reporting.report import plain_math
    >>> plain_math("$\\mathdefault{10^{-2}}$"), plain_math("$\\mathdefault{2\\times10^{1}}$"), plain_math("")
    ('10⁻²', '2×10¹', '')
    """
    if len(label) < 2 or not (label.startswith("$") and label.endswith("$")):
        return label
    body = label[1:-1]
    if body.startswith("\\mathdefault{") and body.endswith("}"):
        body = body[len("\\mathdefault{"):-1]
    body = _MATH_POWER.sub(lambda m: m.group(1).translate(_SUPERSCRIPT), body)
    return body.replace("\\times", "\u00d7").replace("-", "\u2212")


@functools.cache
def _plain_formatter_class():
    from matplotlib.ticker import Formatter

    class PlainMathFormatter(Formatter):
        """Another formatter's labels through :func:`plain_math` (it still decides which ticks get one)."""

        def __init__(self, inner):
            self.inner = inner

        def set_axis(self, axis):
            super().set_axis(axis)
            self.inner.set_axis(axis)

        def set_locs(self, locs):
            super().set_locs(locs)
            self.inner.set_locs(locs)

        def __call__(self, x, pos=None):
            return plain_math(self.inner(x, pos))

        def format_data(self, value):
            return plain_math(self.inner.format_data(value))

        def format_data_short(self, value):
            return plain_math(self.inner.format_data_short(value))

    return PlainMathFormatter


def _log_ticks(*axes) -> None:
    """Ticks of the log-scaled axes among ``axes`` (matplotlib Axis objects): labels through
    :func:`plain_math`, and minor ticks at 2 and 5 times each power of ten instead of 2 to 9.

    Each tick is a handful of artists made at draw time: the fewer minor
    ticks took 0.2 s off the histograms and NEES pictures at 5,000 scans
    (0.68 + 0.39 s -> 0.59 + 0.27 s of CPU).
    """
    from matplotlib.ticker import LogLocator

    cls = _plain_formatter_class()
    for axis in axes:
        if axis.get_scale() == "log":
            axis.set_minor_locator(LogLocator(subs=(2.0, 5.0)))
            axis.set_major_formatter(cls(axis.get_major_formatter()))
            axis.set_minor_formatter(cls(axis.get_minor_formatter()))


def _anchor(poses: np.ndarray) -> np.ndarray:
    """Express a trajectory relative to its first pose so maps start alike."""
    return se2.compose(se2.inverse(poses[0]), poses) if len(poses) else poses


def _map_points(scan_points, stride=MAP_STRIDE):
    """Every ``stride``-th point of each scan, (M, 2) in its robot frame, and the index of its scan (M,)."""
    parts = [np.asarray(p, dtype=float).reshape(-1, 2)[::stride] for p in scan_points]
    if not parts:
        return np.zeros((0, 2)), np.zeros(0, dtype=np.int64)
    return np.concatenate(parts), np.repeat(np.arange(len(parts)), [len(p) for p in parts])


def map_points_only(data: ReportData) -> ReportData:
    """``data`` with each scan cut to the points the map pictures draw (``map_stride`` becomes 1).

    The map pictures of the result are the same bytes as those of ``data``.

    Examples
    --------
    >>> import numpy as np
    >>> from closurecheck.reporting.report import ReportData, map_points_only
    >>> from closurecheck.verification.verdicts import VerdictTable
    >>> none = np.zeros(0, int)
    >>> table = VerdictTable(src=none, dst=none, origin=np.zeros(0, object), accepted=np.zeros(0, bool),
    ...                      reason=np.zeros(0, object), delta=np.zeros((0, 3)), covariance=np.zeros((0, 3, 3)))
    >>> data = ReportData(log_name="one scan", ids=np.arange(1), odom=np.zeros((1, 3)), poses=np.zeros((1, 3)),
    ...                   scan_points=[np.ones((7, 2))], verdicts=table)
    >>> cut = map_points_only(data)
    >>> cut.scan_points[0].shape, cut.map_stride
    ((3, 2), 1)
    """
    points = [np.asarray(p, dtype=float).reshape(-1, 2)[::data.map_stride] for p in data.scan_points]
    return dataclasses.replace(data, scan_points=points, map_stride=1)


def _draw_map(ax, poses, points, owner, colour, title):
    if len(points):
        # All scans in one call (a call per scan was 0.05 s per map at 5,000 scans).
        w = se2.transform_points(poses[owner], points[:, None, :])[:, 0]
        ax.plot(w[:, 0], w[:, 1], ",", color=colour, alpha=0.6, rasterized=True)
    ax.plot(poses[:, 0], poses[:, 1], "-", color=TRAJECTORY_COLOUR, lw=0.6, alpha=0.8)
    ax.plot(poses[:1, 0], poses[:1, 1], "o", color=TRAJECTORY_COLOUR, ms=5)
    ax.set_title(title, y=_TITLE_Y)
    ax.set_aspect("equal", adjustable="datalim")
    ax.set_xlabel("x (m)")
    ax.set_ylabel("y (m)")


def figure_maps(data: ReportData) -> bytes:
    """Odometry-only map next to the optimised one, both anchored at the first keyframe."""
    fig, (axes,) = _figure(13, 6.2, 1, 2, top=0.35, bottom=0.55, left=0.75, wgap=0.75)
    points, owner = _map_points(data.scan_points, data.map_stride)
    _draw_map(axes[0], _anchor(data.odom), points, owner, ODOM_COLOUR, "Odometry only")
    _draw_map(axes[1], _anchor(data.poses), points, owner, MAP_COLOUR, "With verified loop closures")
    return _png(fig)


def figure_agreement(data: ReportData) -> bytes | None:
    """Where the scans of different visits were compared on the optimised map, and where they disagree."""
    check = data.free_space
    if check is None or not len(check.a):
        return None
    poses = _anchor(data.poses)
    mid = 0.5 * (poses[check.a, :2] + poses[check.b, :2])
    bad = check.contradicts
    # The legend hangs below the axes (at most three rows).
    fig, ((ax,),) = _figure(9, _panel_height(poses, 9), top=0.15, bottom=1.1, left=0.75)
    ax.plot(poses[:, 0], poses[:, 1], "-", color=TRAJECTORY_COLOUR, lw=0.8, label="trajectory (optimised)")
    ax.plot(mid[~bad, 0], mid[~bad, 1], ".", color=ACCEPT_COLOUR, ms=3,
            label=f"visits that agree ({int((~bad).sum())} pairs)")
    if bad.any():
        ax.scatter(mid[bad, 0], mid[bad, 1], s=12 + 4 * np.minimum(check.length_m[bad], 25.0), color=REJECT_COLOUR,
                   edgecolor="k", lw=0.4, zorder=3,
                   label=f"scans that contradict ({int(bad.sum())} pairs; size: metres of wall in free space)")
    ax.set_aspect("equal", adjustable="datalim")
    ax.set_xlabel("x (m)")
    ax.set_ylabel("y (m)")
    ax.legend(loc="upper center", bbox_to_anchor=(0.5, -0.08), ncol=1, fontsize=8, frameon=False)
    return _png(fig)


def _ellipse_points(cov2, centre, n_sigma, scale, n=48):
    """Points (..., n, 2) of the ``n_sigma`` contour of 2-D Gaussians (``cov2`` (..., 2, 2), ``centre`` (..., 2)),
    magnified ``scale`` times.

    Every returned point p satisfies (p - c)^T cov2^-1 (p - c) = (n_sigma * scale)^2.
    """
    cov2 = np.asarray(cov2, dtype=float)
    vals, vecs = np.linalg.eigh(0.5 * (cov2 + np.swapaxes(cov2, -1, -2)))
    vals = np.clip(vals, 0.0, None)
    a = np.linspace(0, 2 * np.pi, n)
    circle = np.stack([np.cos(a), np.sin(a)], -1) * (n_sigma * scale * np.sqrt(vals))[..., None, :]
    return np.asarray(centre, dtype=float)[..., None, :] + circle @ np.swapaxes(vecs, -1, -2)


def _nice_scale(x: float) -> float:
    """Round a magnification down to 1, 2 or 5 times a power of ten (at least 1)."""
    if not np.isfinite(x) or x <= 1.0:
        return 1.0
    p = 10.0 ** math.floor(math.log10(x))
    return float(max(m for m in (1.0, 2.0, 5.0) if m * p <= x) * p)


def ellipse_magnification(data: ReportData, fraction: float = 0.006) -> float:
    """How much the closures' 3-sigma ellipses are magnified to be visible.

    Ellipses of a few centimetres vanish on a 50 m map: the median ellipse's
    largest semi-axis is scaled to about ``fraction`` of the map's extent,
    rounded down to 1, 2 or 5 times a power of ten.
    """
    v = data.verdicts
    cov = v.covariance[v.accepted] if len(v) else np.zeros((0, 3, 3))
    ok = np.isfinite(cov).all(axis=(1, 2))
    if not ok.any() or len(data.poses) < 2:
        return 1.0
    std = np.sqrt(np.clip(np.linalg.eigvalsh(cov[ok][:, :2, :2])[:, -1], 0.0, None))
    extent = float(np.ptp(data.poses[:, :2], axis=0).max())
    return _nice_scale(fraction * extent / max(3.0 * float(np.median(std)), 1e-9))


def _segments(poses, index, src, dst):
    """x and y arrays of line segments between keyframes (NaN-separated, one plot call)."""
    pairs = [(index[int(s)], index[int(d)]) for s, d in zip(src, dst) if int(s) in index and int(d) in index]
    if not pairs:
        return None
    a, b = np.array(pairs).T
    gap = np.full(len(a), np.nan)
    return (np.stack([poses[a, 0], poses[b, 0], gap], 1).ravel(),
            np.stack([poses[a, 1], poses[b, 1], gap], 1).ravel())


def _panel_height(poses: np.ndarray, width: float = 6.5) -> float:
    """Figure height (inches) for side-by-side map panels ``width`` inches wide:
    tall floor plans get taller figures instead of thin panels."""
    if len(poses) < 2:
        return 6.4
    w, h = np.ptp(poses[:, :2], axis=0)
    return float(np.clip(width * h / max(w, 1e-9), 4.5, 11.0))


def figure_loops(data: ReportData, ellipse_scale: float) -> bytes:
    """Two panels on the optimised trajectory: verified closures with their
    3-sigma position ellipses (magnified ``ellipse_scale`` times), and the
    rejected candidates coloured by the stage that stopped them."""
    poses = _anchor(data.poses)
    index = {int(i): k for k, i in enumerate(data.ids)}
    v = data.verdicts
    acc = np.flatnonzero(v.accepted)
    rej = np.flatnonzero(~v.accepted)
    # The legends hang below the axes, a tenth of the axes' height down (two rows each).
    fig, (axes,) = _figure(13, _panel_height(poses), 1, 2, top=0.35, bottom=1.0, left=0.75, wgap=0.35,
                           sharex=True, sharey=True)
    for ax in axes:
        ax.plot(poses[:, 0], poses[:, 1], "-", color="#b8c2cc", lw=0.8, label="trajectory (optimised)")

    ax = axes[0]
    seg = _segments(poses, index, v.src[acc], v.dst[acc])
    if seg is not None:
        # Closures of a revisit along the same corridor are a few centimetres
        # long: the end markers keep them visible where the line is not.
        ax.plot(*seg, "-", color=ACCEPT_COLOUR, lw=1.1, alpha=0.85, marker="o", ms=2.5,
                label="verified loop closure")
    drawn = [k for k in acc if int(v.src[k]) in index and int(v.dst[k]) in index
             and np.isfinite(v.covariance[k]).all()]
    if drawn:
        si = np.array([index[int(v.src[k])] for k in drawn])
        di = np.array([index[int(v.dst[k])] for k in drawn])
        # The covariance is in the src frame; the ellipse sits on the dst pose it locates.
        rot = se2.rotation(poses[si, 2])
        cov = rot @ np.asarray(v.covariance, float)[drawn][:, :2, :2] @ np.swapaxes(rot, -1, -2)
        pts = _ellipse_points(cov, poses[di, :2], 3.0, ellipse_scale)
        # A NaN after each ellipse separates them within one line.
        pts = np.concatenate([pts, np.full((len(drawn), 1, 2), np.nan)], axis=1).reshape(-1, 2)
        ax.plot(pts[:, 0], pts[:, 1], "-", color=ELLIPSE_COLOUR, lw=0.6, alpha=0.7,
                label=f"3-sigma position ellipse (x{ellipse_scale:g})")
    ax.set_title(f"Verified loop closures ({len(acc)})", y=_TITLE_Y)

    ax = axes[1]
    groups = np.array([Reason(str(r)).group for r in v.reason[rej]], dtype=object)
    for name in GROUPS:
        colour, label = REJECT_STYLE[name]
        sel = rej[groups == name] if len(rej) else rej
        seg = _segments(poses, index, v.src[sel], v.dst[sel])
        if seg is not None:
            ax.plot(*seg, "-", color=colour, lw=0.5, alpha=0.4, label=f"{label} ({len(sel)})")
    ax.set_title(f"Rejected candidates ({len(rej)})", y=_TITLE_Y)

    for ax in axes:
        # Shared axes keep both panels on one scale; "box" is the aspect mode that allows sharing.
        ax.set_aspect("equal", adjustable="box")
        ax.set_xlabel("x (m)")
        legend = ax.legend(loc="upper center", bbox_to_anchor=(0.5, -0.1), ncol=2, fontsize=8, frameon=False)
        for handle in legend.legend_handles:
            # The lines are faint where thousands overlap; their key must not be.
            handle.set_alpha(1.0)
            handle.set_linewidth(2.0)
    axes[0].set_ylabel("y (m)")
    return _png(fig)


def histogram_edges(values, threshold: float | None = None, bins: int = 30):
    """Bin edges for one check figure; returns (edges, log_scale).

    Chi-square figures of wrong candidates reach 1e6 while the accepted sit
    near 3: a positive figure whose maximum exceeds 100 times its median gets
    log-spaced bins (from the smallest positive value, at most seven
    decades).  Otherwise the bins are linear over the values, except
    that a far tail (beyond the 99th percentile by more than half the bulk's
    width) is cut off so the bulk is not squeezed into one bar.  The caller
    clips values into the edges, so every value is counted.  ``threshold``,
    when given, is always inside the range.
    """
    vals = np.asarray(values, dtype=float)
    vals = vals[np.isfinite(vals)]
    if not len(vals):
        return np.linspace(0.0, 1.0, bins + 1), False
    thr = threshold if threshold is not None and np.isfinite(threshold) else None
    pos = vals[vals > 0]
    if vals.min() >= 0 and len(pos) and pos.max() > 100.0 * np.median(pos):
        # Small chi-square values are the good ones: start at the smallest
        # positive value, but span at most seven decades.
        hi = float(pos.max())
        lo = max(float(pos.min()), hi * 1e-7)
        if thr is not None and thr > 0:
            lo, hi = min(lo, thr / 2.0), max(hi, thr * 2.0)
        if hi > lo > 0:
            return np.geomspace(lo, hi, bins + 1), True
    lo, hi = float(vals.min()), float(vals.max())
    q = float(np.quantile(vals, 0.99))
    if q > lo and hi - q > 0.5 * (q - lo):
        hi = q + 0.05 * (q - lo)
    if thr is not None:
        lo, hi = min(lo, thr), max(hi, thr)
        pad = 0.03 * (hi - lo)
        lo, hi = (lo - pad if thr <= lo + pad else lo), (hi + pad if thr >= hi - pad else hi)
    if hi <= lo:
        half = 0.5 if lo == 0 else 0.5 * abs(lo)
        lo, hi = lo - half, hi + half
    return np.linspace(lo, hi, bins + 1), False


def figure_histograms(data: ReportData) -> bytes | None:
    """Stacked histograms (rejected under accepted) of the check figures."""
    v = data.verdicts
    present = [(k, lab) for k, lab in HISTOGRAM_FIGURES
               if k in v.figures and np.isfinite(np.asarray(v.figures[k], float)).any()]
    if not present:
        return None
    cols = 3
    rows = -(-len(present) // cols)
    # Titles of up to three 9-point lines above each panel.
    fig, axes = _figure(13, 3.1 * rows, rows, cols, top=0.55, bottom=0.3, left=0.45, wgap=0.55, hgap=0.85)
    for ax, (key, label) in zip(axes.ravel(), present):
        vals = np.asarray(v.figures[key], dtype=float)
        ok = np.isfinite(vals)
        thr = data.thresholds.get(key)
        edges, log_scale = histogram_edges(vals[ok], thr)
        clipped = np.clip(vals, edges[0], edges[-1])
        # One filled outline per layer, stacked on the counts below it: the
        # same bars as a stacked ax.hist, which makes a Rectangle per bar
        # (about 0.3 s for these six panels at 5,000 scans).
        below_counts = np.zeros(len(edges) - 1)
        for accepted, colour, name in ((False, REJECT_COLOUR, "rejected"), (True, ACCEPT_COLOUR, "accepted")):
            sel = ok & (v.accepted == accepted)
            if sel.any():
                top = below_counts + np.histogram(clipped[sel], bins=edges)[0]
                ax.stairs(top, edges, baseline=below_counts, fill=True, color=colour, alpha=0.75,
                          label=f"{name} ({int(sel.sum())})")
                below_counts = top
        if log_scale:
            ax.set_xscale("log")
            _log_ticks(ax.xaxis)
        if thr is not None and np.isfinite(thr):
            ax.axvline(thr, color="#1d2733", ls="--", lw=1.0,
                       label=THRESHOLD_LABEL.get(key, "bound {:.3g}").format(thr))
        below, above = int((vals[ok] < edges[0]).sum()), int((vals[ok] > edges[-1]).sum())
        title = f"{label}\n{int(ok.sum())} of {len(vals)} candidates reached this check"
        clipped_text = [f"{below} below {edges[0]:.3g} in the first bar"] if below else []
        clipped_text += [f"{above} above {edges[-1]:.3g} in the last bar"] if above else []
        if clipped_text:
            title += "\n" + "; ".join(clipped_text)
        ax.set_title(title, fontsize=9, y=_TITLE_Y)
        ax.tick_params(labelsize=8)
        ax.legend(fontsize=7)
    for ax in axes.ravel()[len(present):]:
        ax.axis("off")
    return _png(fig)


def trajectories_in_map_frame(data: ReportData):
    """(truth, odometry, optimised) keyframe positions (M, 2) in the maps' frame, or None without truth.

    The maps are drawn relative to the first keyframe's pose (x forward).
    The truth, kept in its own (floor-plan) frame by the log, is brought
    into that frame by the least-squares rigid alignment onto the optimised
    trajectory, and the odometry by its rigid alignment onto that truth, as
    the ATE is measured (a rigid alignment changes no distance, so the
    errors drawn are the ones scored).  Only keyframes with truth are kept.
    """
    from .trajectory import align_rigid

    if data.truth is None:
        return None
    ok = np.isfinite(data.truth).all(axis=1)
    if ok.sum() < 2:
        return None
    optimised = _anchor(data.poses)[ok, :2]
    al = align_rigid(data.truth[ok, :2], optimised)
    truth = data.truth[ok, :2] @ al.rotation.T + al.translation
    odo = _anchor(data.odom)[ok, :2]
    al_odo = align_rigid(odo, truth)
    return truth, odo @ al_odo.rotation.T + al_odo.translation, optimised


def figure_truth(data: ReportData) -> bytes | None:
    """Odometry-only and optimised trajectories against ground truth, in the maps' frame
    (:func:`trajectories_in_map_frame`)."""
    lines = trajectories_in_map_frame(data)
    if lines is None:
        return None
    truth, odo, optimised = lines
    # The legend hangs below the axes (one or two rows).
    fig, ((ax,),) = _figure(6.2, 5.2, top=0.35, bottom=1.0, left=0.75)
    ax.plot(truth[:, 0], truth[:, 1], "-", color=TRUTH_COLOUR, lw=3.0, alpha=0.7,
            label="ground truth (rigidly aligned)")
    ax.plot(odo[:, 0], odo[:, 1], "-", color=ODOM_COLOUR, lw=1.0, label="odometry only (rigidly aligned)")
    ax.plot(optimised[:, 0], optimised[:, 1], "-", color=TRAJECTORY_COLOUR, lw=1.0, label="optimised")
    ax.set_aspect("equal", adjustable="datalim")
    ax.legend(fontsize=8, loc="upper center", bbox_to_anchor=(0.5, -0.12), ncol=3, frameon=False)
    ax.set_title("Trajectories against ground truth, in the maps' frame", y=_TITLE_Y)
    ax.set_xlabel("x (m)")
    ax.set_ylabel("y (m)")
    return _png(fig)


def figure_nees(score: dict) -> bytes | None:
    """The verified closures' NEES against chi-square(3): histogram and quantile-quantile plot.

    Left: NEES on logarithmic bins with the counts chi-square(3)
    (closurecheck.core.stats) predicts for that many closures.  Right: sorted
    NEES against chi-square(3) quantiles at (i - 0.5) / n; points on the
    diagonal are honest covariances, below it too large, above it too small.
    """
    from ..core.stats import chi2_cdf, chi2_quantiles, chi2_threshold

    x = np.asarray(score.get("nees_values") or [], float)
    x = np.sort(x[np.isfinite(x) & (x > 0)])
    if len(x) < 2:
        return None
    # Two-line title on the left panel.
    fig, ((ax, aq),) = _figure(12, 4.0, 1, 2, top=0.45, bottom=0.5, left=0.7, wgap=0.8)
    lo = min(float(x[0]), chi2_threshold(0.001, 3)) / 1.5
    hi = max(float(x[-1]), chi2_threshold(0.999, 3)) * 1.5
    edges = np.geomspace(lo, hi, 31)
    ax.stairs(np.histogram(x, bins=edges)[0], edges, fill=True, color=ACCEPT_COLOUR, alpha=0.7,
              label=f"verified closures ({len(x)})")
    expected = len(x) * np.diff(chi2_cdf(edges, 3))
    ax.step(edges, np.r_[expected, expected[-1]], where="post", color="#1d2733", lw=1.2,
            label="chi-square(3), expected count")
    for q, style in ((0.5, ":"), (0.025, "--"), (0.975, "--")):
        ax.axvline(chi2_threshold(q, 3), color="#5b6b7c", ls=style, lw=0.9)
    ax.set_xscale("log")
    _log_ticks(ax.xaxis)
    ax.set_xlabel("NEES (squared Mahalanobis error against truth)")
    ax.set_ylabel("closures")
    inside50 = score.get("nees_share_in_central_50pct", math.nan)
    inside95 = score.get("nees_share_in_central_95pct", math.nan)
    ax.set_title(f"mean {_num(score.get('nees_mean'))}, median {_num(score.get('nees_median'))} "
                 f"(honest: 3, 2.37)\ninside the central 50%: {_num(inside50, 2)} (0.5), 95%: "
                 f"{_num(inside95, 2)} (0.95); dashed: the 95% bounds", fontsize=9, y=_TITLE_Y)
    ax.legend(fontsize=8)
    q = chi2_quantiles((np.arange(1, len(x) + 1) - 0.5) / len(x), 3)
    aq.loglog(q, x, ".", color=ACCEPT_COLOUR, ms=3, label="sorted NEES")
    span = np.array([min(q[0], x[0]), max(q[-1], x[-1])])
    aq.loglog(span, span, "-", color="#1d2733", lw=1.0, label="honest (y = x)")
    _log_ticks(aq.xaxis, aq.yaxis)
    aq.set_xlabel("chi-square(3) quantile")
    aq.set_ylabel("NEES")
    aq.set_title("Quantile-quantile: below the line, covariances too large; above, too small", fontsize=9, y=_TITLE_Y)
    aq.legend(fontsize=8)
    return _png(fig)


def figure_precision_recall(score: dict) -> bytes | None:
    """Precision against recall over the front-end's score, with the best recall at precision 1 marked."""

    curve = score.get("frontend_pr_curve")
    if not curve or len(curve.get("recall", [])) < 2:
        return None
    fig, ((ax,),) = _figure(6.2, 4.4, top=0.3, bottom=0.55, left=0.75)
    reference = "this run's verdicts (a reference, not the truth)" if score.get("reference") == REFERENCE_VERDICTS \
        else "the ground truth"
    ax.step(curve["recall"], curve["precision"], where="post", color=TRAJECTORY_COLOUR, lw=1.5,
            label=f"score >= threshold; average precision {_num(score.get('frontend_average_precision'))}")
    r1, t1 = score.get("frontend_recall_at_precision_1"), score.get("frontend_threshold_at_precision_1")
    if r1 is not None and np.isfinite(r1) and r1 > 0:
        ax.plot([r1], [1.0], "o", color=ACCEPT_COLOUR, ms=7,
                label=f"highest recall at precision 1: {_num(r1)} (score >= {_num(t1, 4)})")
    ax.set_xlim(-0.02, 1.02)
    ax.set_ylim(0.0, 1.05)
    ax.set_xlabel("recall (share of the right pairs kept)")
    ax.set_ylabel("precision (right / kept)")
    ax.set_title(f"Front-end score against {reference}", fontsize=9, y=_TITLE_Y)
    ax.legend(fontsize=8, loc="lower left")
    return _png(fig)



# The report's pictures by file name (figures/NAME.png), in the order they
# are drawn, each with the progress text shown before it.
PICTURES = (("map", "maps"), ("loops", "loop closures"), ("checks", "check figures"),
            ("agreement", "scan agreement"), ("truth", "ground truth and scores"),
            ("nees", "ground truth and scores"), ("precision-recall", "ground truth and scores"))
# The pictures of a scored run only.
SCORE_PICTURES = ("truth", "nees", "precision-recall")


def draw_picture(name: str, data: ReportData) -> bytes | None:
    """The PNG of one of the report's :data:`PICTURES` by name, or None where it does not apply
    (no ground truth, no scan agreement check, too few values).

    Examples
    --------
    >>> import numpy as np
    >>> from closurecheck.reporting.report import ReportData, draw_picture
    >>> from closurecheck.verification.verdicts import VerdictTable
    >>> none = np.zeros(0, int)
    >>> table = VerdictTable(src=none, dst=none, origin=np.zeros(0, object), accepted=np.zeros(0, bool),
    ...                      reason=np.zeros(0, object), delta=np.zeros((0, 3)), covariance=np.zeros((0, 3, 3)))
    >>> data = ReportData(log_name="two scans", ids=np.arange(2), odom=np.zeros((2, 3)), poses=np.zeros((2, 3)),
    ...                   scan_points=[np.ones((3, 2)), np.ones((3, 2))], verdicts=table)
    >>> draw_picture("map", data)[:8], draw_picture("checks", data)
    (b'\\x89PNG\\r\\n\\x1a\\n', None)
    """
    if name == "map":
        return figure_maps(data)
    if name == "loops":
        return figure_loops(data, ellipse_magnification(data))
    if name == "checks":
        return figure_histograms(data)
    if name == "agreement":
        return figure_agreement(data)
    if not data.score:
        return None
    if name == "truth":
        return figure_truth(data)
    if name == "nees":
        return figure_nees(data.score)
    if name == "precision-recall":
        return figure_precision_recall(data.score)
    raise ValueError(f"no picture named {name!r}")


@dataclass(frozen=True, eq=False)
class AgreementPairs:
    """What :func:`figure_agreement` reads of a :class:`closurecheck.verification.free_space.FreeSpaceCheck`:
    keyframe positions ``a``, ``b`` (P,), ``contradicts`` (P,) bool and ``length_m`` (P,) metres.

    The picture worker receives this instead, so that it need not import
    the free-space module (and scipy with it, about 0.8 s).
    """

    a: np.ndarray
    b: np.ndarray
    contradicts: np.ndarray
    length_m: np.ndarray

    @property
    def count(self) -> int:
        return int(np.asarray(self.contradicts).sum())


_CSS = """
body{font-family:system-ui,-apple-system,Segoe UI,Helvetica,Arial,sans-serif;margin:0;color:#1d2733;background:#f6f7f9}
header{background:#1d2733;color:#fff;padding:16px 28px 10px}
header h1{margin:0;font-size:22px;overflow-wrap:anywhere} header p{margin:4px 0 0;color:#c9d3de;font-size:13px}
nav{margin-top:8px;font-size:13px} nav a{color:#9fd0ff;margin-right:14px;text-decoration:none}
main{padding:6px 28px 40px;max-width:1400px}
section{background:#fff;border:1px solid #dde2e8;border-radius:6px;padding:14px 18px;margin:14px 0}
h2{font-size:17px;margin:0 0 10px} h3{font-size:14px;margin:4px 0 6px}
p{margin:4px 0 10px;line-height:1.4}
.caution{border-left:6px solid #d9822b;background:#fff8ef}
.sound{border-left:6px solid #1a9850;background:#f2fbf5}
.doubtful{border-left:8px solid #b0302a;background:#fdf0ef}
.lead{font-size:15px}
.cards{display:flex;flex-wrap:wrap;gap:10px}
.card{border:1px solid #dde2e8;border-radius:5px;padding:8px 12px;min-width:130px}
.card b{display:block;font-size:20px} .card span{font-size:12px;color:#5b6b7c}
.card.good{border-color:#1a9850;background:#f1faf4} .card.bad{border-color:#d73027;background:#fdf1f0}
.row{display:flex;gap:36px;flex-wrap:wrap;margin-top:12px;align-items:flex-start}
.key span{display:inline-block;width:14px;height:4px;margin:0 5px 3px 12px;vertical-align:middle}
img{max-width:100%;height:auto;display:block}
table{border-collapse:collapse;font-size:12px}
th,td{border-bottom:1px solid #e6e9ee;padding:3px 7px;text-align:right;white-space:nowrap}
th{background:#eef1f5;position:sticky;top:0}
table.sortable th{cursor:pointer;user-select:none}
th[aria-sort=ascending]:after{content:" \\25B2"} th[aria-sort=descending]:after{content:" \\25BC"}
td.txt,th.txt,.kv td.txt{text-align:left} .kv td.desc{color:#5b6b7c;text-align:left;white-space:normal}
tr.acc td.verdict{color:#1a7a43;font-weight:600} tr.rej td.verdict{color:#b0302a}
.bar{display:inline-block;height:9px;background:#d73027;vertical-align:middle}
.bar.acc{background:#1a9850}
.scroll{max-height:560px;overflow:auto;border:1px solid #e6e9ee}
.kv td{text-align:left} .kv td+td{text-align:right}
.scores{display:flex;gap:28px;flex-wrap:wrap;align-items:flex-start}
.score-tables{display:grid;grid-template-columns:repeat(2,max-content);gap:10px 28px;align-content:start}
.truth-picture{flex:1 1 480px;max-width:640px}
pre{background:#f3f5f8;padding:10px;overflow:auto;font-size:12px}
"""

_SORT_JS = """
document.querySelectorAll('table.sortable').forEach(function(t){
  var heads=t.tHead.rows[0].cells;
  Array.prototype.forEach.call(heads,function(th,i){
    function sortBy(){
      var asc=th.getAttribute('aria-sort')!=='ascending';
      Array.prototype.forEach.call(heads,function(h){h.removeAttribute('aria-sort');});
      th.setAttribute('aria-sort',asc?'ascending':'descending');
      var body=t.tBodies[0];
      var rows=Array.prototype.map.call(body.rows,function(r,k){
        var v=r.cells[i].getAttribute('data-v');return {r:r,v:v,n:parseFloat(v),k:k};});
      var numeric=rows.every(function(o){return o.v===''||!isNaN(o.n);});
      rows.sort(function(a,b){
        if(a.v===''||b.v===''){return (a.v==='')-(b.v==='')||a.k-b.k;}
        var c=numeric?a.n-b.n:(a.v<b.v?-1:a.v>b.v?1:0);
        return (asc?c:-c)||a.k-b.k;});
      var frag=document.createDocumentFragment();
      rows.forEach(function(o){frag.appendChild(o.r);});
      body.appendChild(frag);
    }
    th.tabIndex=0;
    th.addEventListener('click',sortBy);
    th.addEventListener('keydown',function(e){if(e.key==='Enter'||e.key===' '){e.preventDefault();sortBy();}});
  });
});
"""

COLUMN_TEXT = {
    "from": "scan id of the first keyframe", "to": "scan id of the second keyframe",
    "origin": "which proposer found the pair", "verdict": "accepted or rejected",
    "reason": "the check that decided", "dx (m)": "registered delta, from-frame",
    "dy (m)": "registered delta, from-frame", "dtheta (deg)": "registered heading change",
    "margin": "signed margin against the deciding check, relative to its bound (docs/verification.md)",
    "deciding check": "the check the margin is measured against",
    "score": "the front-end's confidence in the pair (pairs file)",
    "verifier_reason": "what the checks alone said (without the reviewer's decisions)",
    "review_note": "the reviewer's note",
    "overlap": "fraction of points matched", "rmse_m": "point-to-line RMS residual (m)",
    "ambiguity": "second-best / best fit score", "odometry_chi2": "squared Mahalanobis distance to odometry",
    "pair_support": "consistent partners (PCM degree)", "graph_chi2": "squared Mahalanobis residual after optimisation",
    "map_chi2": "squared Mahalanobis distance to the verified map", "gnc_weight": "robust weight at the end of GNC",
    "map_std_m": "relative position standard deviation of the map (m)",
}

# The figures the overlay lists, in this order, with the words before each bound.
OVERLAY_FIGURES = ("score", "overlap", "rmse_m", "ambiguity", "odometry_chi2", "pair_support", "map_chi2",
                   "map_std_m", "gnc_weight", "graph_chi2")
BOUND_TEXT = {"overlap": "pass: at least", "rmse_m": "pass: at most", "ambiguity": "pass: at most",
              "odometry_chi2": "gate: at most", "map_chi2": "pass: at most", "map_std_m": "pass: at most",
              "gnc_weight": "pass: at least", "graph_chi2": "pass: at most"}
CHECK_TEXT = {"overlap": "the overlap check", "rmse": "the RMSE check", "ambiguity": "the ambiguity check",
              "odometry_gate": "the odometry gate", "map_gate": "the map gate (distance and map tightness)",
              "gnc_weight": "the GNC weight floor", "graph_residual": "the residual test after optimisation"}


def _img(name: str, png: bytes, alt: str) -> str:
    b64 = base64.b64encode(png).decode("ascii")
    return f'<img id="{name}" alt="{html.escape(alt)}" src="data:image/png;base64,{b64}">'


def _fmt(v) -> tuple[str, str]:
    """(display text, sort key) of a table value."""
    if isinstance(v, (bool, np.bool_)):
        return ("yes" if v else "no", "1" if v else "0")
    if isinstance(v, (float, np.floating)):
        if not np.isfinite(v):
            return "", ""
        return (f"{v:.4g}", repr(float(v)))
    return (str(v), str(v))


def _column_cells(values, klass: str) -> list:
    """The <td> of each value of one table column, as :func:`_fmt` writes them, formatted a column at a time.

    Numeric and boolean columns skip the per-value type tests (and the
    escaping: their text holds no markup); text columns escape each
    distinct value once.  The whole table (3,400 rows, 26 columns) took
    0.24 s cell by cell and 0.07 s this way, with the same bytes
    (5,000-scan warehouse log).
    """
    arr = np.asarray(values)
    head = f'<td class="{klass}" data-v="'
    kind = arr.dtype.kind
    if kind == "b":
        return [f'{head}1">yes</td>' if b else f'{head}0">no</td>' for b in arr.tolist()]
    if kind in "iu":
        return [f'{head}{i}">{i}</td>' for i in arr.tolist()]
    if kind == "f":
        return [f'{head}{x!r}">{x:.4g}</td>' if math.isfinite(x) else f'{head}"></td>' for x in arr.tolist()]
    seen = {}
    out = []
    for v in arr.tolist() if kind in "US" else arr:
        cell = seen.get(v) if isinstance(v, str) else None
        if cell is None:
            text, key = _fmt(v)
            cell = f'{head}{html.escape(key)}">{html.escape(text)}</td>'
            if isinstance(v, str):
                seen[v] = cell
        out.append(cell)
    return out


def _candidate_table(v: VerdictTable, limit: int, margins: Margins | None = None) -> str:
    keys = [k for k in v.figures if np.asarray(v.figures[k]).dtype.kind in "fiub"]
    optional = v.optional_columns()
    head = ["from", "to", "origin", "verdict", "reason", "dx (m)", "dy (m)", "dtheta (deg)"]
    if margins is not None:
        head += ["margin", "deciding check"]
    head += list(optional) + keys
    txt_cols = {"origin", "verdict", "reason", "deciding check", "verifier_reason", "review_note"}
    out = ['<table class="sortable" id="candidates"><thead><tr>']
    for h in head:
        tip = f' title="{html.escape(COLUMN_TEXT[h])}; click to sort"' if h in COLUMN_TEXT else ' title="click to sort"'
        out.append(f'<th class="{"txt" if h in txt_cols else "num"}"{tip}>{html.escape(h)}</th>')
    out.append("</tr></thead><tbody>")
    order = np.lexsort((v.dst, v.src, ~np.asarray(v.accepted, bool)))[:limit]
    accepted = np.asarray(v.accepted, bool)[order]
    delta = np.asarray(v.delta, float).reshape(-1, 3)[order]
    columns = [np.asarray(v.src)[order].astype(np.int64), np.asarray(v.dst)[order].astype(np.int64),
               np.asarray(v.origin)[order].astype(str), np.where(accepted, "accepted", "rejected"),
               np.asarray(v.reason)[order].astype(str), delta[:, 0], delta[:, 1], np.degrees(delta[:, 2])]
    if margins is not None:
        columns += [np.asarray(margins.value, float)[order], np.asarray(margins.check)[order].astype(str)]
    columns += [np.asarray(col)[order] for col in optional.values()]
    columns += [np.asarray(v.figures[key])[order] for key in keys]
    cells = []
    for h, col in zip(head, columns):
        klass = "txt" if h in txt_cols else ""
        if h == "verdict":
            klass += " verdict"
        cells.append(_column_cells(col, klass.strip()))
    starts = [f'<tr class="{"acc" if a else "rej"}" data-k="{k}">' for a, k in zip(accepted.tolist(), order.tolist())]
    out.extend(start + "".join(row) + "</tr>" for start, row in zip(starts, zip(*cells)))
    out.append("</tbody></table>")
    return "".join(out)


def _kv_table(rows, klass: str = "kv") -> str:
    return f'<table class="{klass}">' + "".join(
        f"<tr><td>{html.escape(str(a))}</td><td>{html.escape(str(b))}</td></tr>" for a, b in rows) + "</table>"


def _reason_table(v: VerdictTable) -> str:
    counts = v.counts()
    total = max(len(v), 1)
    rows = []
    for r, n in counts.items():
        width = max(1, round(120 * n / total))
        bar = f'<span class="bar{" acc" if Reason(r).group == "accepted" else ""}" style="width:{width}px"></span>'
        rows.append(f"<tr><td class='txt'>{html.escape(r)}</td><td>{n}</td><td class='txt'>{bar}</td>"
                    f"<td class='desc'>{html.escape(Reason(r).text)}</td></tr>")
    return '<table class="kv" id="reasons">' + "".join(rows) + "</table>"


def _num(value, digits: int = 3) -> str:
    if isinstance(value, bool):
        return "yes" if value else "no"
    if isinstance(value, (int, np.integer)):
        return str(int(value))
    if isinstance(value, (float, np.floating)):
        return "n/a" if not np.isfinite(value) else f"{value:.{digits}g}"
    if value is None:
        return "n/a"
    return str(value)


def _score_section(score: dict) -> str:
    """Scores grouped into small tables with the labels of :data:`closurecheck.reporting.scoring.SECTIONS`;
    keys this page does not know still show under "Other"."""
    from .scoring import TRAJECTORY_TITLE, curve_rows, score_blocks, trajectory_rows

    sections, other = score_blocks(score, _num)
    blocks = [f"<div><h3>{html.escape(title)}</h3>{_kv_table(rows)}</div>" for title, rows in sections]
    traj = trajectory_rows(score)
    if traj:
        rows = "".join(f"<tr><td class='txt'>{html.escape(label)}</td><td>{_num(a)}</td><td>{_num(b)}</td></tr>"
                       for label, a, b in traj)
        blocks.append(f"<div><h3>{html.escape(TRAJECTORY_TITLE)}</h3><table class='kv' id='trajectory-error'><tr>"
                      "<th class='txt'></th><th>odometry only</th><th>optimised</th></tr>"
                      f"{rows}</table></div>")
    if other:
        blocks.append(f"<div><h3>Other</h3>{_kv_table(other)}</div>")
    curve = score.get("frontend_pr_curve")
    if curve:
        rows = "".join(f"<tr><td>{_num(t, 4)}</td><td>{_num(p)}</td><td>{_num(r)}</td></tr>"
                       for t, p, r in curve_rows(curve))
        blocks.append("<div><h3>Precision-recall over the front-end score</h3><table class='kv' id='frontend-curve'>"
                      "<tr><th>score &gt;=</th><th>precision</th><th>recall</th></tr>" + rows + "</table></div>")
    pairs = score.get("false_closure_pairs")
    if pairs:
        listed = ", ".join(f"{int(a)}-{int(b)}" for a, b in pairs)
        blocks.append(f"<div><h3>False closures (from-to)</h3><p>{html.escape(listed)}</p></div>")
    return "<div class='score-tables'>" + "".join(blocks) + "</div>"


def _score_cards(score: dict) -> list:
    """(label, value, state) cards for the top of the page."""

    cards = []
    if score.get("reference") == REFERENCE_VERDICTS:
        if "proposals" in score:
            cards.append(("front-end pairs verified (reference, not truth)",
                          f"{score.get('proposals_right', 0)} of {score['proposals']}", ""))
        return cards
    if "false_closures" in score:
        n = int(score["false_closures"])
        cards.append(("false closures (truth)", n, "good" if n == 0 else "bad"))
    if "revisit_events" in score and "revisit_events_closed" in score:
        cards.append(("revisit events closed", f"{score['revisit_events_closed']} of {score['revisit_events']}", ""))
    if "ate_optimised_m" in score:
        odo = score.get("ate_odometry_m")
        label = "trajectory error (ATE)" + (f"; odometry alone {_num(odo)} m" if odo is not None else "")
        cards.append((label, f"{_num(score['ate_optimised_m'])} m", ""))
    return cards


def _trust_section(data: ReportData) -> str:
    """The run's verdict on its own map, first on the page."""
    if not data.trust:
        return ""
    if data.trust == "sound":
        return _section("trust", "Map: sound",
                        "<p>Every check the run makes of its own result passed: the odometry was measured against "
                        "its scans, the verified closures agree with that measurement, the consistent set is "
                        "proven largest, and no two visits of a place contradict each other in the optimised "
                        "map (section &ldquo;Scan agreement&rdquo;). Sound is a statistical judgement, not a "
                        "guarantee: see the caution below.</p>", "sound")
    items = "".join(f"<li>{html.escape(r)}</li>" for r in data.trust_reasons)
    return _section("trust", "Map: DOUBTFUL",
                    "<p><b>Do not use this map without review.</b> The run's own checks found:</p>"
                    f"<ul>{items}</ul><p>The outputs are complete, and the command exited with status 3 so that "
                    "a batch job can stop on it (docs/cli.md). The close calls, the scan agreement and the "
                    "overlays below show where to look.</p>", "doubtful")


def _section(ident: str, title: str, body: str, klass: str = "") -> str:
    cls = f' class="{klass}"' if klass else ""
    return f'<section id="{ident}"{cls}><h2>{html.escape(title)}</h2>{body}</section>'


# --------------------------------------------------------------------------
# the page's data for its script (report_script.py)


def _b64(array, dtype) -> str:
    return base64.b64encode(np.ascontiguousarray(array, dtype=dtype).tobytes()).decode("ascii")


def _rounded(values, digits: int = 4) -> list:
    """JSON-ready numbers with ``digits`` significant digits, None for NaN."""
    out = []
    for x in np.asarray(values, dtype=float).tolist():
        out.append(float(f"{x:.{digits}g}") if math.isfinite(x) else None)
    return out


def encode_scans(scan_points) -> dict:
    """Keyframe scans as the page carries them: robot-frame points in int16 centimetres, base64.

    Returns ``{"points": base64 of little-endian int16 (x, y) pairs, "offsets":
    K + 1 point offsets}``.  A centimetre is the resolution a reviewer needs
    to judge an alignment (and below the scans' own range noise); ±327 m
    covers any indoor scanner.

    Examples
    --------
    >>> import base64, numpy as np
    >>> from closurecheck.reporting.report import encode_scans
    >>> enc = encode_scans([np.array([[1.234, -0.5]]), np.zeros((0, 2)), np.array([[2.0, 3.0], [4.0, 5.0]])])
    >>> enc["offsets"], np.frombuffer(base64.b64decode(enc["points"]), "<i2").tolist()
    ([0, 1, 1, 3], [123, -50, 200, 300, 400, 500])
    """
    parts = [np.asarray(p, dtype=float).reshape(-1, 2) for p in scan_points]
    counts = [len(p) for p in parts]
    pts = np.concatenate(parts) if parts else np.zeros((0, 2))
    cm = np.clip(np.rint(pts * 100.0), -32767, 32767)
    return {"points": _b64(cm, "<i2"), "offsets": np.concatenate([[0], np.cumsum(counts)]).astype(int).tolist()}


def viewer_data(data: ReportData, margins: Margins, ellipse_scale: float) -> dict:
    """Everything the page's script draws: scans, keyframe poses (both anchored at the first keyframe,
    as the maps are drawn), and every candidate's pair, delta, verdict, margin and figures."""
    from ..verification.margins import CHECKS

    v = data.verdicts
    index = {int(i): k for k, i in enumerate(data.ids)}
    src = [index.get(int(a), -1) for a in v.src]
    dst = [index.get(int(b), -1) for b in v.dst]
    reasons = [r.value for r in Reason]
    checks = list(CHECKS)
    checks.remove("map_std")
    cov = np.asarray(v.covariance, dtype=float).reshape(-1, 3, 3)
    cov_xy = np.stack([cov[:, 0, 0], cov[:, 0, 1], cov[:, 1, 1]], axis=1) if len(cov) else np.zeros((0, 3))
    figs = {}
    for name in OVERLAY_FIGURES:
        if name == "score" and v.frontend_score is not None:
            figs[name] = _rounded(v.frontend_score, 6)
        elif name in v.figures and np.asarray(v.figures[name]).dtype.kind in "fiu":
            figs[name] = _rounded(v.figures[name])
    check_figures = {c: [CHECKS[c]] for c in checks}
    check_figures["map_gate"] = ["map_chi2", "map_std_m"]
    return {
        "ids": [int(i) for i in data.ids],
        "scans": encode_scans(data.scan_points),
        "odom": _b64(_anchor(np.asarray(data.odom, float)), "<f4"),
        "poses": _b64(_anchor(np.asarray(data.poses, float)), "<f4"),
        "ellipse_scale": float(ellipse_scale),
        "colours": {"accept": ACCEPT_COLOUR, "map": MAP_COLOUR, "odom": ODOM_COLOUR, "trajectory": TRAJECTORY_COLOUR,
                    "ellipse": ELLIPSE_COLOUR, "scan_from": SCAN_FROM_COLOUR, "scan_to": SCAN_TO_COLOUR},
        "group_colours": {g: REJECT_STYLE[g][0] for g in GROUPS},
        "reasons": reasons,
        "reason_text": {r.value: r.text for r in Reason},
        "reason_groups": [r.group for r in Reason],
        "checks": checks,
        "check_text": CHECK_TEXT,
        "check_figures": check_figures,
        "figure_order": [n for n in OVERLAY_FIGURES if n in figs],
        "figure_text": {n: COLUMN_TEXT.get(n, n) for n in figs},
        "bounds": {k: float(b) for k, b in data.thresholds.items() if k in figs},
        "bound_text": BOUND_TEXT,
        "cands": {
            "src": src, "dst": dst,
            "delta": _b64(np.asarray(v.delta, float).reshape(-1, 3), "<f4"),
            "cov_xy": _b64(cov_xy, "<f4"),
            "acc": [int(a) for a in np.asarray(v.accepted, bool)],
            "reason": [reasons.index(str(r)) for r in v.reason],
            "margin": _rounded(margins.value, 3),
            "check": [checks.index(c) if c in checks else -1 for c in margins.check],
            "figs": figs,
        },
    }


def _script_json(obj) -> str:
    """JSON that is safe inside a <script> element (no "</" can end it early)."""
    return json.dumps(obj, separators=(",", ":"), allow_nan=False).replace("</", "<\\/")


def close_calls(v: VerdictTable, margins: Margins, n: int = CLOSE_CALLS) -> tuple[np.ndarray, np.ndarray]:
    """The verdicts closest to going the other way: (the ``n`` accepted closures with the least margin,
    the ``n`` rejected candidates with the most), each list closest first.  Only candidates decided by
    a bound on a figure have a margin (docs/verification.md, "Margins")."""
    m = np.asarray(margins.value, float)
    acc = np.asarray(v.accepted, bool)
    a = np.flatnonzero(acc & np.isfinite(m))
    r = np.flatnonzero(~acc & np.isfinite(m))
    return a[np.argsort(m[a], kind="stable")][:n], r[np.argsort(-m[r], kind="stable")][:n]


def _decide_buttons() -> str:
    return ("<button type='button' class='acc' data-decision='accept' title='add an accept row to the decisions'>"
            "accept</button><button type='button' class='rej' data-decision='reject' "
            "title='add a reject row to the decisions'>reject</button>")


def _close_call_cards(v: VerdictTable, margins: Margins, rows) -> str:
    cards = []
    for k in rows:
        k = int(k)
        check = str(margins.check[k])
        verdict = "verified" if v.accepted[k] else "rejected"
        cards.append(
            f"<div class='call' data-k='{k}'><h4>{int(v.src[k])} &ndash; {int(v.dst[k])}: {verdict}, "
            f"{html.escape(str(v.reason[k]))}</h4><p>margin <b>{_num(float(margins.value[k]), 3)}</b> against "
            f"{html.escape(CHECK_TEXT.get(check, check))}</p>"
            "<div class='pair'><div class='viewer call-registered'></div><div class='viewer call-odometry'></div></div>"
            f"<div class='decide'><button type='button' class='call-open'>open</button>{_decide_buttons()}</div></div>")
    return "".join(cards)


def _overlay_panel() -> str:
    return (
        "<div id='overlay-panel' hidden role='dialog' aria-label='overlay of two scans'>"
        "<div class='ohead'><h3 class='otitle'></h3><span class='overdict'></span>"
        "<span class='omargin hint'></span><span style='flex:1'></span>"
        "<button type='button' class='oclose' title='close (Esc)'>close</button></div>"
        "<div class='obody'><div class='viewer' id='overlay-registered'></div>"
        "<div class='viewer' id='overlay-odometry'></div><div class='ofig'>"
        f"<p class='legend'><span class='dot' style='background:{SCAN_FROM_COLOUR}'></span>from scan"
        f"<span class='dot' style='background:{SCAN_TO_COLOUR}'></span>to scan</p>"
        "<p class='hint'>Left: the to scan at the registered delta; right: at the delta the odometry "
        "predicts. Well-registered walls coincide on the left. Wheel or +/&minus; to zoom (both views "
        "together), drag to pan, double-click to fit.</p>"
        "<table class='kv'><tbody class='ofigs'></tbody></table>"
        "<h4>Your decision</h4><div class='decide'>"
        f"{_decide_buttons()}<input class='onote' type='text' placeholder='note (optional)'></div>"
        "<p class='hint'>Adds a row to the decisions at the end of the page, for "
        "<code>closurecheck run LOG --decisions FILE.csv</code>.</p></div></div></div>")


def build_report(out_dir, data: ReportData, *, table_limit: int = 5000, progress=None, pictures=None) -> Path:
    """Draw the pictures and write ``report.html`` into ``out_dir``.

    Returns the report's path.  The PNGs are also written to
    ``out_dir/figures`` (the maps too, as static pictures; the page draws
    its maps itself, zoomable).  At most ``table_limit`` candidates go into
    the page's table (accepted first); candidates.csv has them all, and
    every candidate's overlay is in the page.  ``progress`` (optional,
    :class:`closurecheck.reporting.terminal.Progress`) is told each picture
    as it is drawn.  ``pictures`` (optional) is a
    :class:`closurecheck.reporting.picture_worker.PictureJob`, or a list of
    them, drawing some of the pictures in other processes, started on the
    same ``data``; the others are drawn here meanwhile, and a job's are
    drawn here too if it fails.
    """
    from ..verification.margins import decision_margins

    out_dir = Path(out_dir)
    fig_dir = out_dir / "figures"
    fig_dir.mkdir(parents=True, exist_ok=True)

    def step(text):
        if progress is not None:
            progress.step(f"report: {text}")

    v = data.verdicts
    scale = ellipse_magnification(data)
    margins = decision_margins(v.reason, v.figures, data.thresholds)
    jobs = [] if pictures is None else [pictures] if hasattr(pictures, "names") else list(pictures)
    remote = {name for job in jobs for name in job.names}

    def page():
        step("page")
        return _candidate_table(v, table_limit, margins), _script_json(viewer_data(data, margins, scale))

    if remote:
        # The page's text parts first, while the second process draws.
        table, page_data = page()
    pngs, told = {}, set()

    def draw(names, elsewhere=frozenset()):
        # Pictures in ``elsewhere`` are being drawn by the second process: told, not drawn.
        for name, text in PICTURES:
            if (name in names or name in elsewhere) and text not in told \
                    and (data.score or name not in SCORE_PICTURES):
                step(text if name in names else f"{text} (second process)")
                told.add(text)
            if name in names:
                pngs[name] = draw_picture(name, data)
                if not gc.isenabled():
                    # A drawn figure is a reference cycle holding its data (the
                    # maps: every scan point, twice).  write_outputs pauses the
                    # collector; the young generation, which holds the figure, is
                    # collected at once, in milliseconds.
                    gc.collect(0)

    draw({name for name, _ in PICTURES} - remote, remote)
    if remote:
        failed = set()
        for job in jobs:
            got = job.result()
            if got is None:
                failed.update(job.names)
            else:
                pngs.update(got)
        if failed:
            # A second process failed: its pictures are drawn here, where an error is raised as it is.
            told.clear()
            draw(failed)
    else:
        table, page_data = page()
    # Static maps for documents and mail; the page draws its own, zoomable.
    write_bytes(fig_dir / "map.png", pngs["map"])
    write_bytes(fig_dir / "loops.png", pngs["loops"])
    alts = {"checks": "Histograms of the check figures",
            "agreement": "Where the scans of different visits agree and contradict",
            "truth": "Trajectories against ground truth", "nees": "NEES against chi-square(3)",
            "precision-recall": "Precision and recall over the front-end score"}
    pictures_shown = [(name, pngs[name], alts[name]) for name, _ in PICTURES
                      if name in alts and pngs.get(name) is not None]
    for name, png, _ in pictures_shown:
        write_bytes(fig_dir / f"{name}.png", png)
    pics = {name: _img(name, png, alt) for name, png, alt in pictures_shown}

    n_acc = int(np.asarray(v.accepted, bool).sum())
    n_review = int(sum(str(r).startswith("reviewer_") for r in v.reason))
    cards = [("keyframes", len(data.ids), ""), ("candidates", len(v), ""),
             ("verified closures", n_acc, ""), ("rejected", len(v) - n_acc, "")]
    if n_review:
        cards.append(("decided by a reviewer", n_review, ""))
    if data.score:
        cards += _score_cards(data.score)
    card_html = "".join(f'<div class="card {state}"><b>{html.escape(str(b))}</b><span>{html.escape(a)}</span></div>'
                        for a, b, state in cards)
    timing = _kv_table([(k, f"{s:.2f} s") for k, s in data.timings.items()])
    notes = ("<div><h3>Notes</h3><ul id='notes'>" + "".join(f"<li>{html.escape(str(n))}</li>" for n in data.notes)
             + "</ul></div>") if data.notes else ""
    name = html.escape(data.log_name)
    reference = bool(data.score) and data.score.get("reference") == REFERENCE_VERDICTS
    accepted_calls, rejected_calls = close_calls(v, margins)
    nav = ([("trust", "Map: " + data.trust)] if data.trust else []) + [
        ("glance", "At a glance"), ("maps", "Maps"), ("loops-section", "Loop closures"), ("close-calls", "Close calls")]
    if "agreement" in pics:
        nav.append(("agreement-section", "Scan agreement"))
    if "checks" in pics:
        nav.append(("checks-section", "Checks"))
    if data.score:
        nav.append(("score", "Scoring"))
    nav += [("table-section", "Candidates"), ("decisions", "Decisions")]
    if data.config_text:
        nav.append(("config", "Settings"))
    lead = (f"{n_acc} of {len(v)} loop-closure candidates were verified and kept in graph.json; "
            f"the other {len(v) - n_acc} were rejected by the check named in their reason.")
    if n_review:
        lead += f" A reviewer's decisions overruled the checks for {n_review} of them."
    key_rej = "".join(f'<span class="sw" style="background:{c}"></span>{html.escape(lab)}'
                      for c, lab in (REJECT_STYLE[g] for g in GROUPS))
    how = ("Wheel or +/&minus; to zoom (to the centimetre), drag to pan, double-click to fit; the two views move "
           "together. Click a closure line to lay its two scans over each other.")
    noscript = ("<noscript><p class='caution'>The maps and overlays need JavaScript; static pictures are in "
                "figures/map.png and figures/loops.png beside this report.</p></noscript>")
    parts = [
        "<!DOCTYPE html><html lang='en'><head><meta charset='utf-8'>",
        "<meta name='viewport' content='width=device-width, initial-scale=1'>",
        f"<title>closurecheck report: {name}</title>",
        f"<style>{_CSS}{VIEWER_CSS}</style></head><body>",
        f"<header><h1>Loop-closure report: {name}</h1>",
        "<p>closurecheck: verified loop closures and calibrated covariances for 2D LiDAR pose graphs</p>",
        "<nav>" + "".join(f"<a href='#{i}'>{t}</a>" for i, t in nav) + "</nav></header>",
        "<main>",
        _trust_section(data),
        _section("caution", "Caution", f"<p>{html.escape(SAFETY_TEXT)}</p>", "caution"),
        _section("glance", "At a glance",
                 f"<p class='lead'>{html.escape(lead)}</p><div class='cards'>{card_html}</div>"
                 f"<div class='row'><div><h3>Verdicts by reason</h3>{_reason_table(v)}</div>"
                 f"<div><h3>Run</h3>{_kv_table(data.summary)}</div>"
                 f"<div><h3>Time per stage</h3>{timing}</div>{notes}</div>"),
        _section("maps", "Maps",
                 "<p>Every keyframe scan drawn at its pose, in the frame of the first keyframe (its pose is the "
                 "origin, x forward; dot: the first keyframe): left with odometry alone, right after optimising "
                 "the graph with the verified closures (green lines). Doubled or smeared walls on the left are "
                 "drift; on the right the walls should be single and sharp. Not every mark is a wall: people, "
                 "carts and other things that moved while the robot drove leave faint trails and scattered "
                 f"points, in both maps.</p><p class='hint'>{how}</p>{noscript}"
                 "<div class='pair'><div class='viewer' id='map-odometry'></div>"
                 "<div class='viewer' id='map-optimised'></div></div>"),
        _section("loops-section", "Loop closures",
                 f"<p class='key legend'>Left: the verified closures kept in graph.json, each with the 3-sigma "
                 f"position ellipse of the closure at its second keyframe, magnified x{scale:g} to be visible. "
                 f"Right: the rejected candidates by the stage that stopped them ({key_rej}). A rejected line "
                 f"spanning distant places is a look-alike that the checks caught. Both on the optimised "
                 f"trajectory, in the maps' frame.</p><p class='hint'>{how}</p>"
                 "<div class='pair'><div class='viewer' id='loops-verified'></div>"
                 "<div class='viewer' id='loops-rejected'></div></div>"),
        _section("close-calls", "Close calls",
                 "<p>The verdicts nearest to going the other way: the verified closures with the least margin "
                 "and the rejected candidates with the most, measured against the check that decided them "
                 "(relative to its bound: +0.1 passed by a tenth of the bound, &minus;0.1 failed by a tenth; "
                 "docs/verification.md, &ldquo;Margins&rdquo;). Each shows its two scans at the registered pose "
                 "and, for contrast, where the odometry puts them. Confirm or overrule them with the buttons; "
                 "the rows collect under <a href='#decisions'>Decisions</a>.</p>"
                 f"<h3>Verified, least margin ({len(accepted_calls)})</h3>"
                 f"<div class='calls' id='calls-accepted'>{_close_call_cards(v, margins, accepted_calls)}</div>"
                 f"<h3>Rejected, most margin ({len(rejected_calls)})</h3>"
                 f"<div class='calls' id='calls-rejected'>{_close_call_cards(v, margins, rejected_calls)}</div>"),
    ]
    if "agreement" in pics:
        fs = data.free_space
        parts.append(_section("agreement-section", "Scan agreement",
                              f"<p>A check that needs no ground truth: after optimisation, {len(fs.a)} pairs of "
                              "overlapping keyframes from different visits were laid over each other. A beam says "
                              "there is nothing before its return, so a wall of one visit inside the free space of "
                              "the other means the map misplaces one of them. Red marks the pairs where at least "
                              "3 m of surface, and a fifth of what the pair could judge, contradicts; a person or "
                              "cart that moved between the visits is far smaller. "
                              f"{fs.count} pair(s) contradict.</p>" + pics["agreement"]))
    if "checks" in pics:
        thr_text = (" Dashed lines are the bounds of this run's checks." if data.thresholds else "")
        parts.append(_section("checks-section", "Check figures",
                              "<p>How accepted (green, stacked on top) and rejected (red) candidates fall on "
                              "each check; a candidate appears only on the checks it reached." + thr_text
                              + " Heavy-tailed figures use a logarithmic axis.</p>" + pics["checks"]))
    if data.score:
        side = "".join(f"<div class='truth-picture'>{pics[n]}</div>" for n in ("truth", "precision-recall")
                       if n in pics)
        nees = f"<div>{pics['nees']}</div>" if "nees" in pics else ""
        if reference:
            title = "Scoring against this run's verdicts (a reference, not the truth)"
            intro = (f"<p class='caution'><b>Reference, not truth.</b> {html.escape(REFERENCE_NOTE)} "
                     "<code>closurecheck score</code> prints the same.</p>")
        else:
            title = "Scoring against ground truth"
            intro = ("<p>The log carries ground truth, so the run is scored as <code>closurecheck score</code> "
                     "does (docs/scoring.md defines every figure). Closures are judged by their registered "
                     "delta; revisits by the true poses alone, so a correct closure between scans a few metres "
                     "apart or facing opposite ways counts as correct without being at a revisit pair. The "
                     "trajectories are drawn in the maps' frame, the truth rigidly aligned to it.</p>")
        parts.append(_section("score", title, intro + f"<div class='scores'>{_score_section(data.score)}{side}</div>"
                              + nees))
    shown = min(len(v), table_limit)
    parts.append(_section("table-section", "Candidates",
                          f"<p>{shown} of {len(v)} candidates, verified first; click a column heading to sort "
                          f"(again to reverse), a row to lay its two scans over each other. All of them are in "
                          f"candidates.csv, with the variances of x, y and theta (the full covariance of each "
                          f"verified closure is in graph.json).</p>"
                          f'<div class="scroll">{table}</div>'))
    parts.append(_section("decisions", "Decisions",
                          "<p>Rows for <code>closurecheck run LOG --decisions decisions.csv</code>: each accept or "
                          "reject button above adds or replaces the row of its pair; you can also edit the text. "
                          "The next run overrules the checks for these pairs (docs/verification.md, &ldquo;Reviewer "
                          "decisions&rdquo;).</p><div class='dtools'><button type='button' id='decisions-copy'>copy"
                          "</button><button type='button' id='decisions-save'>download decisions.csv</button>"
                          "<button type='button' id='decisions-clear'>clear</button><span class='hint'>rows: "
                          "<span id='decisions-count'>0</span></span></div>"
                          "<textarea id='decisions-text' spellcheck='false'>from,to,decision,note\n</textarea>"))
    if data.config_text:
        parts.append(_section("config", "Settings",
                              "<details><summary>Effective settings of this run (also in config.toml; rerun "
                              f"with --config)</summary><pre>{html.escape(data.config_text)}</pre></details>"))
    parts.append("</main>" + _overlay_panel())
    parts.append("<script type='application/json' id='report-data'>"
                 f"{page_data}</script>")
    parts.append(f"<script>{_SORT_JS}</script><script>{VIEWER_JS}</script></body></html>")
    path = out_dir / "report.html"
    write_text(path, "\n".join(parts))
    return path
