"""The run report: a self-contained report.html with embedded PNG pictures.

The pictures are also written beside it (``figures/*.png``).  Everything the
page needs is inside the file (no scripts, styles or fonts from the network),
so it opens in any browser offline and can be mailed to a colleague.

The page reads top to bottom in the order a reviewer asks questions: is the
run trustworthy at a glance (counts, scores, notes), does the map look right
(odometry-only next to optimised), where are the closures and the rejected
candidates, how did each check split them, and finally every candidate in a
sortable table.
"""

from __future__ import annotations

import base64
import html
import io
import math
import re
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from ..core import se2
from ..core.stats import chi2_threshold
from ..io.atomic import write_bytes, write_text
from ..verification.reasons import GROUPS, Reason
from ..verification.verdicts import VerdictTable

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
}

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


@dataclass(frozen=True, eq=False)
class ReportData:
    """What the report shows; all poses (K, 3) in metres/radians.

    ``ids`` are the keyframe scan ids in node order; ``odom`` their odometry
    poses and ``poses`` the optimised ones (one fixed frame each);
    ``scan_points`` the keyframes' valid returns (N_k, 2) in the robot frame
    (m); ``truth`` (K, 3) or None.  ``thresholds`` maps a check figure's
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


def check_thresholds(verify_options) -> dict:
    """Bounds of the verification checks by figure name, for the histograms.

    ``verify_options`` is a :class:`closurecheck.verification.verify.VerifyOptions`; the
    chi-square figures get the quantile of chi-square with 3 degrees of
    freedom at the configured probability (squared Mahalanobis distance of a
    3-vector, dimensionless).  Options missing from the object are skipped.
    """

    out = {}
    for key, name in (("overlap", "min_overlap"), ("rmse_m", "max_rmse_m"), ("ambiguity", "max_ambiguity")):
        if hasattr(verify_options, name):
            out[key] = float(getattr(verify_options, name))
    for key, name in (("odometry_chi2", "gate_probability"), ("map_chi2", "map_probability"),
                      ("graph_chi2", "residual_probability")):
        if hasattr(verify_options, name):
            out[key] = chi2_threshold(float(getattr(verify_options, name)))
    return out


def _png(fig) -> bytes:
    buf = io.BytesIO()
    # No "Software" text chunk: the PNGs stay byte-identical across matplotlib versions' banners.
    fig.savefig(buf, format="png", dpi=100, bbox_inches="tight", metadata={"Software": None})
    return buf.getvalue()


def _anchor(poses: np.ndarray) -> np.ndarray:
    """Express a trajectory relative to its first pose so maps start alike."""
    return se2.compose(se2.inverse(poses[0]), poses) if len(poses) else poses


def _draw_map(ax, poses, scan_points, colour, title, stride=3):
    xs, ys = [], []
    for pose, pts in zip(poses, scan_points):
        if len(pts):
            w = se2.transform_points(pose, np.asarray(pts)[::stride])
            xs.append(w[:, 0])
            ys.append(w[:, 1])
    if xs:
        ax.plot(np.concatenate(xs), np.concatenate(ys), ",", color=colour, alpha=0.6, rasterized=True)
    ax.plot(poses[:, 0], poses[:, 1], "-", color=TRAJECTORY_COLOUR, lw=0.6, alpha=0.8)
    ax.plot(poses[:1, 0], poses[:1, 1], "o", color=TRAJECTORY_COLOUR, ms=5)
    ax.set_title(title)
    ax.set_aspect("equal", adjustable="datalim")
    ax.set_xlabel("x (m)")
    ax.set_ylabel("y (m)")


def figure_maps(data: ReportData) -> bytes:
    """Odometry-only map next to the optimised one, both anchored at the first keyframe."""
    import matplotlib.pyplot as plt

    fig, axes = plt.subplots(1, 2, figsize=(13, 6.2))
    _draw_map(axes[0], _anchor(data.odom), data.scan_points, ODOM_COLOUR, "Odometry only")
    _draw_map(axes[1], _anchor(data.poses), data.scan_points, MAP_COLOUR, "With verified loop closures")
    fig.tight_layout()
    out = _png(fig)
    plt.close(fig)
    return out


def _ellipse_points(cov2, centre, n_sigma, scale, n=48):
    """Points of the ``n_sigma`` contour of a 2-D Gaussian, magnified ``scale`` times.

    Every returned point p satisfies (p - c)^T cov2^-1 (p - c) = (n_sigma * scale)^2.
    """
    vals, vecs = np.linalg.eigh(0.5 * (cov2 + cov2.T))
    vals = np.clip(vals, 0.0, None)
    a = np.linspace(0, 2 * np.pi, n)
    circle = np.stack([np.cos(a), np.sin(a)], -1) * (n_sigma * scale * np.sqrt(vals))
    return centre + circle @ vecs.T


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
    import matplotlib.pyplot as plt

    poses = _anchor(data.poses)
    index = {int(i): k for k, i in enumerate(data.ids)}
    v = data.verdicts
    acc = np.flatnonzero(v.accepted)
    rej = np.flatnonzero(~v.accepted)
    fig, axes = plt.subplots(1, 2, figsize=(13, _panel_height(poses)), sharex=True, sharey=True)
    for ax in axes:
        ax.plot(poses[:, 0], poses[:, 1], "-", color="#b8c2cc", lw=0.8, label="trajectory (optimised)")

    ax = axes[0]
    seg = _segments(poses, index, v.src[acc], v.dst[acc])
    if seg is not None:
        # Closures of a revisit along the same corridor are a few centimetres
        # long: the end markers keep them visible where the line is not.
        ax.plot(*seg, "-", color=ACCEPT_COLOUR, lw=1.1, alpha=0.85, marker="o", ms=2.5,
                label="verified loop closure")
    ex, ey = [], []
    for k in acc:
        s, d = int(v.src[k]), int(v.dst[k])
        if s not in index or d not in index or not np.isfinite(v.covariance[k]).all():
            continue
        # The covariance is in the src frame; the ellipse sits on the dst pose it locates.
        rot = se2.rotation(poses[index[s], 2])
        pts = _ellipse_points(rot @ v.covariance[k][:2, :2] @ rot.T, poses[index[d], :2], 3.0, ellipse_scale)
        ex.append(np.append(pts[:, 0], np.nan))
        ey.append(np.append(pts[:, 1], np.nan))
    if ex:
        ax.plot(np.concatenate(ex), np.concatenate(ey), "-", color=ELLIPSE_COLOUR, lw=0.6, alpha=0.7,
                label=f"3-sigma position ellipse (x{ellipse_scale:g})")
    ax.set_title(f"Verified loop closures ({len(acc)})")

    ax = axes[1]
    groups = np.array([Reason(str(r)).group for r in v.reason[rej]], dtype=object)
    for name in GROUPS:
        colour, label = REJECT_STYLE[name]
        sel = rej[groups == name] if len(rej) else rej
        seg = _segments(poses, index, v.src[sel], v.dst[sel])
        if seg is not None:
            ax.plot(*seg, "-", color=colour, lw=0.5, alpha=0.4, label=f"{label} ({len(sel)})")
    ax.set_title(f"Rejected candidates ({len(rej)})")

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
    fig.tight_layout()
    out = _png(fig)
    plt.close(fig)
    return out


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
    import matplotlib.pyplot as plt

    v = data.verdicts
    present = [(k, lab) for k, lab in HISTOGRAM_FIGURES
               if k in v.figures and np.isfinite(np.asarray(v.figures[k], float)).any()]
    if not present:
        return None
    cols = 3
    rows = -(-len(present) // cols)
    fig, axes = plt.subplots(rows, cols, figsize=(13, 3.1 * rows), squeeze=False)
    for ax, (key, label) in zip(axes.ravel(), present):
        vals = np.asarray(v.figures[key], dtype=float)
        ok = np.isfinite(vals)
        thr = data.thresholds.get(key)
        edges, log_scale = histogram_edges(vals[ok], thr)
        clipped = np.clip(vals, edges[0], edges[-1])
        stack, colours, names = [], [], []
        for accepted, colour, name in ((False, REJECT_COLOUR, "rejected"), (True, ACCEPT_COLOUR, "accepted")):
            sel = ok & (v.accepted == accepted)
            if sel.any():
                stack.append(clipped[sel])
                colours.append(colour)
                names.append(f"{name} ({int(sel.sum())})")
        ax.hist(stack, bins=edges, stacked=True, color=colours, alpha=0.75, label=names)
        if log_scale:
            ax.set_xscale("log")
        if thr is not None and np.isfinite(thr):
            ax.axvline(thr, color="#1d2733", ls="--", lw=1.0,
                       label=THRESHOLD_LABEL.get(key, "bound {:.3g}").format(thr))
        below, above = int((vals[ok] < edges[0]).sum()), int((vals[ok] > edges[-1]).sum())
        title = f"{label}\n{int(ok.sum())} of {len(vals)} candidates reached this check"
        clipped_text = [f"{below} below {edges[0]:.3g} in the first bar"] if below else []
        clipped_text += [f"{above} above {edges[-1]:.3g} in the last bar"] if above else []
        if clipped_text:
            title += "\n" + "; ".join(clipped_text)
        ax.set_title(title, fontsize=9)
        ax.tick_params(labelsize=8)
        ax.legend(fontsize=7)
    for ax in axes.ravel()[len(present):]:
        ax.axis("off")
    fig.tight_layout()
    out = _png(fig)
    plt.close(fig)
    return out


def figure_truth(data: ReportData) -> bytes | None:
    """Odometry-only and optimised trajectories, each rigidly aligned to ground truth."""
    import matplotlib.pyplot as plt

    from .trajectory import align_rigid

    if data.truth is None:
        return None
    ok = np.isfinite(data.truth).all(axis=1)
    if ok.sum() < 2:
        return None
    fig, ax = plt.subplots(figsize=(6.2, 5.2))
    truth = data.truth[ok]
    ax.plot(truth[:, 0], truth[:, 1], "-", color=TRUTH_COLOUR, lw=3.0, alpha=0.7, label="ground truth")
    for poses, colour, label in ((data.odom[ok], ODOM_COLOUR, "odometry only"),
                                 (data.poses[ok], TRAJECTORY_COLOUR, "optimised")):
        al = align_rigid(poses[:, :2], truth[:, :2])
        p = poses[:, :2] @ al.rotation.T + al.translation
        ax.plot(p[:, 0], p[:, 1], "-", color=colour, lw=1.0, label=f"{label} (rigidly aligned)")
    ax.set_aspect("equal", adjustable="datalim")
    ax.legend(fontsize=8, loc="upper center", bbox_to_anchor=(0.5, -0.12), ncol=3, frameon=False)
    ax.set_title("Trajectories against ground truth")
    ax.set_xlabel("x (m)")
    ax.set_ylabel("y (m)")
    fig.tight_layout()
    out = _png(fig)
    plt.close(fig)
    return out


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
    "overlap": "fraction of points matched", "rmse_m": "point-to-line RMS residual (m)",
    "ambiguity": "second-best / best fit score", "odometry_chi2": "squared Mahalanobis distance to odometry",
    "pair_support": "consistent partners (PCM degree)", "graph_chi2": "squared Mahalanobis residual after optimisation",
    "map_chi2": "squared Mahalanobis distance to the verified map", "gnc_weight": "robust weight at the end of GNC",
}


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


def _candidate_table(v: VerdictTable, limit: int) -> str:
    keys = [k for k in v.figures if np.asarray(v.figures[k]).dtype.kind in "fiub"]
    head = ["from", "to", "origin", "verdict", "reason", "dx (m)", "dy (m)", "dtheta (deg)"] + keys
    txt_cols = {"origin", "verdict", "reason"}
    out = ['<table class="sortable" id="candidates"><thead><tr>']
    for h in head:
        tip = f' title="{html.escape(COLUMN_TEXT[h])}; click to sort"' if h in COLUMN_TEXT else ' title="click to sort"'
        out.append(f'<th class="{"txt" if h in txt_cols else "num"}"{tip}>{html.escape(h)}</th>')
    out.append("</tr></thead><tbody>")
    figures = [np.asarray(v.figures[key]) for key in keys]
    order = np.lexsort((v.dst, v.src, ~np.asarray(v.accepted, bool)))[:limit]
    for k in order:
        d = v.delta[k]
        vals = [int(v.src[k]), int(v.dst[k]), str(v.origin[k]),
                "accepted" if v.accepted[k] else "rejected", str(v.reason[k]),
                float(d[0]), float(d[1]), float(np.degrees(d[2]))]
        vals += [f[k] for f in figures]
        cells = []
        for h, val in zip(head, vals):
            text, key = _fmt(val)
            klass = "txt" if h in txt_cols else ""
            if h == "verdict":
                klass += " verdict"
            cells.append(f'<td class="{klass.strip()}" data-v="{html.escape(key)}">{html.escape(text)}</td>')
        out.append(f'<tr class="{"acc" if v.accepted[k] else "rej"}">' + "".join(cells) + "</tr>")
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
        bar = f'<span class="bar{" acc" if r == "accepted" else ""}" style="width:{width}px"></span>'
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
    return str(value)


_SCORE_GROUPS = (
    ("Loop closures", (("accepted", "verified closures"), ("false_closures", "false closures"),
                       ("closure_precision", "precision"),
                       ("true_pairs_among_candidates", "true revisit pairs among candidates"),
                       ("closure_recall", "recall of those pairs"))),
    ("Revisit events", (("revisit_events", "revisit events in the truth"),
                        ("revisit_events_closed", "closed by a verified closure"),
                        ("revisit_event_recall", "event recall"),
                        ("candidate_event_recall", "event recall of the candidates"))),
    ("Covariance honesty (NEES of verified closures)",
     (("nees_mean", "mean (3 for honest covariances)"), ("nees_median", "median"),
      ("nees_closures", "closures scored"))),
    ("Candidate list", (("pairs", "pairs"), ("true_pairs", "true revisit pairs"), ("pair_precision", "precision"),
                        ("revisit_events_reached", "revisit events reached"),
                        ("proposals_per_keyframe", "proposals per keyframe"))),
)
_TRAJ_KEY = re.compile(r"^(ate|rpe_(?P<d>[0-9.]+)m)_(?P<which>odometry|optimised)_m$")


def _score_section(score: dict) -> str:
    """Scores grouped into small tables; keys this page does not know still show under "Other"."""
    used = {"candidates"}
    blocks = []
    for title, keys in _SCORE_GROUPS:
        rows = [(label, _num(score[k])) for k, label in keys if k in score]
        used.update(k for k, _ in keys)
        if rows:
            blocks.append(f"<div><h3>{html.escape(title)}</h3>{_kv_table(rows)}</div>")
    traj: dict = {}
    for key, value in score.items():
        m = _TRAJ_KEY.match(key)
        if m:
            label = "ATE after rigid alignment" if key.startswith("ate") else f"RPE over {m.group('d')} m"
            traj.setdefault(label, {})[m.group("which")] = value
            used.add(key)
    if traj:
        rows = "".join(f"<tr><td class='txt'>{html.escape(label)}</td><td>{_num(vals.get('odometry'))}</td>"
                       f"<td>{_num(vals.get('optimised'))}</td></tr>" for label, vals in traj.items())
        blocks.append("<div><h3>Trajectory error (m, RMS)</h3><table class='kv' id='trajectory-error'><tr>"
                      "<th class='txt'></th><th>odometry only</th><th>optimised</th></tr>"
                      f"{rows}</table></div>")
    used.add("ate_ratio")
    other = [(k.replace("_", " "), _num(v)) for k, v in score.items()
             if k not in used and not isinstance(v, (dict, list))]
    if other:
        blocks.append(f"<div><h3>Other</h3>{_kv_table(other)}</div>")
    pairs = score.get("false_closure_pairs")
    if pairs:
        listed = ", ".join(f"{int(a)}-{int(b)}" for a, b in pairs)
        blocks.append(f"<div><h3>False closures (from-to)</h3><p>{html.escape(listed)}</p></div>")
    return "<div class='score-tables'>" + "".join(blocks) + "</div>"


def _score_cards(score: dict) -> list:
    """(label, value, state) cards for the top of the page."""
    cards = []
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


def _section(ident: str, title: str, body: str, klass: str = "") -> str:
    cls = f' class="{klass}"' if klass else ""
    return f'<section id="{ident}"{cls}><h2>{html.escape(title)}</h2>{body}</section>'


def build_report(out_dir, data: ReportData, *, table_limit: int = 5000, progress=None) -> Path:
    """Draw the pictures and write ``report.html`` into ``out_dir``.

    Returns the report's path.  The PNGs are also written to
    ``out_dir/figures``.  At most ``table_limit`` candidates go into the
    page's table (accepted first); candidates.csv has them all.
    ``progress`` (optional, :class:`closurecheck.reporting.terminal.Progress`)
    is told each picture as it is drawn.
    """
    import matplotlib

    # Before pyplot is imported: no window system, no GUI event loop or
    # threads that could outlive an interrupted run.
    matplotlib.use("Agg", force=False)
    out_dir = Path(out_dir)
    fig_dir = out_dir / "figures"
    fig_dir.mkdir(parents=True, exist_ok=True)

    def step(text):
        if progress is not None:
            progress.step(f"report: {text}")

    v = data.verdicts
    scale = ellipse_magnification(data)
    step("maps")
    pictures = [("map", figure_maps(data), "Maps: odometry only and with verified closures")]
    step("loop closures")
    pictures.append(("loops", figure_loops(data, scale),
                     "Verified closures and rejected candidates on the trajectory"))
    step("check figures")
    hist = figure_histograms(data)
    if hist is not None:
        pictures.append(("checks", hist, "Histograms of the check figures"))
    if data.score:
        step("ground truth")
    truth = figure_truth(data) if data.score else None
    if truth is not None:
        pictures.append(("truth", truth, "Trajectories against ground truth"))
    step("page")
    for name, png, _ in pictures:
        write_bytes(fig_dir / f"{name}.png", png)
    pics = {name: _img(name, png, alt) for name, png, alt in pictures}

    n_acc = int(np.asarray(v.accepted, bool).sum())
    cards = [("keyframes", len(data.ids), ""), ("candidates", len(v), ""),
             ("verified closures", n_acc, ""), ("rejected", len(v) - n_acc, "")]
    if data.score:
        cards += _score_cards(data.score)
    card_html = "".join(f'<div class="card {state}"><b>{html.escape(str(b))}</b><span>{html.escape(a)}</span></div>'
                        for a, b, state in cards)
    timing = _kv_table([(k, f"{s:.2f} s") for k, s in data.timings.items()])
    notes = ("<div><h3>Notes</h3><ul id='notes'>" + "".join(f"<li>{html.escape(str(n))}</li>" for n in data.notes)
             + "</ul></div>") if data.notes else ""
    name = html.escape(data.log_name)
    nav = [("glance", "At a glance"), ("maps", "Maps"), ("loops-section", "Loop closures")]
    if "checks" in pics:
        nav.append(("checks-section", "Checks"))
    if data.score:
        nav.append(("score", "Scoring"))
    nav.append(("table-section", "Candidates"))
    if data.config_text:
        nav.append(("config", "Settings"))
    lead = (f"{n_acc} of {len(v)} loop-closure candidates were verified and kept in graph.json; "
            f"the other {len(v) - n_acc} were rejected by the check named in their reason.")
    key_rej = "".join(f'<span style="background:{c}"></span>{html.escape(lab)}' for c, lab in (REJECT_STYLE[g] for g in GROUPS))
    parts = [
        "<!DOCTYPE html><html lang='en'><head><meta charset='utf-8'>",
        "<meta name='viewport' content='width=device-width, initial-scale=1'>",
        f"<title>closurecheck report: {name}</title>",
        f"<style>{_CSS}</style></head><body>",
        f"<header><h1>Loop-closure report: {name}</h1>",
        "<p>closurecheck: verified loop closures and calibrated covariances for 2D LiDAR pose graphs</p>",
        "<nav>" + "".join(f"<a href='#{i}'>{t}</a>" for i, t in nav) + "</nav></header>",
        "<main>",
        _section("caution", "Caution", f"<p>{html.escape(SAFETY_TEXT)}</p>", "caution"),
        _section("glance", "At a glance",
                 f"<p class='lead'>{html.escape(lead)}</p><div class='cards'>{card_html}</div>"
                 f"<div class='row'><div><h3>Verdicts by reason</h3>{_reason_table(v)}</div>"
                 f"<div><h3>Run</h3>{_kv_table(data.summary)}</div>"
                 f"<div><h3>Time per stage</h3>{timing}</div>{notes}</div>"),
        _section("maps", "Maps",
                 "<p>Every keyframe scan drawn at its pose (dot: first keyframe): left with odometry alone, "
                 "right after optimising the graph with the verified closures. Doubled or smeared walls on the "
                 "left are drift; the right map should show single, sharp walls.</p>" + pics["map"]),
        _section("loops-section", "Loop closures",
                 f"<p class='key'>Left: the verified closures kept in graph.json, each with the 3-sigma position "
                 f"ellipse of the closure at its second keyframe, magnified x{scale:g} to be visible. Right: the "
                 f"rejected candidates by the stage that stopped them ({key_rej}). A rejected line spanning "
                 f"distant places is a look-alike that the checks caught; the table gives each one's reason.</p>"
                 + pics["loops"]),
    ]
    if "checks" in pics:
        thr_text = (" Dashed lines are the bounds of this run's checks." if data.thresholds else "")
        parts.append(_section("checks-section", "Check figures",
                              "<p>How accepted (green, stacked on top) and rejected (red) candidates fall on "
                              "each check; a candidate appears only on the checks it reached." + thr_text
                              + " Heavy-tailed figures use a logarithmic axis.</p>" + pics["checks"]))
    if data.score:
        truth_img = f"<div class='truth-picture'>{pics['truth']}</div>" if "truth" in pics else ""
        parts.append(_section("score", "Scoring against ground truth",
                              "<p>The log carries ground truth, so the run is scored as "
                              "<code>closurecheck score</code> does. A false closure is a verified closure "
                              "whose delta is wrong by more than the scoring tolerance.</p>"
                              f"<div class='scores'>{_score_section(data.score)}{truth_img}</div>"))
    shown = min(len(v), table_limit)
    parts.append(_section("table-section", "Candidates",
                          f"<p>{shown} of {len(v)} candidates, verified first; click a column heading to sort "
                          f"(again to reverse). All of them are in candidates.csv, with the variances of x, y and theta (the full covariance of each verified closure is in graph.json).</p>"
                          f'<div class="scroll">{_candidate_table(v, table_limit)}</div>'))
    if data.config_text:
        parts.append(_section("config", "Settings",
                              "<details><summary>Effective settings of this run (also in config.toml; rerun "
                              f"with --config)</summary><pre>{html.escape(data.config_text)}</pre></details>"))
    parts.append(f"</main><script>{_SORT_JS}</script></body></html>")
    path = out_dir / "report.html"
    write_text(path, "\n".join(parts))
    return path
