"""The run report: a self-contained report.html with embedded PNG pictures.

The pictures are also written beside it (``figures/*.png``).  Everything the
page needs is inside the file (no scripts or styles from the network), so it
opens in any browser offline and can be mailed to a colleague.
"""

from __future__ import annotations

import base64
import html
import io
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from . import se2
from .atomic import write_bytes, write_text
from .verdicts import VerdictTable

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


@dataclass(frozen=True, eq=False)
class ReportData:
    """What the report shows; all poses (K, 3) in metres/radians.

    ``ids`` are the keyframe scan ids in node order; ``odom`` their odometry
    poses and ``poses`` the optimised ones; ``scan_points`` the keyframes'
    valid returns in the robot frame; ``truth`` (K, 3) or None.
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


def _png(fig) -> bytes:
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=110, bbox_inches="tight")
    return buf.getvalue()


def _anchor(poses: np.ndarray) -> np.ndarray:
    """Express a trajectory relative to its first pose so maps start alike."""
    return se2.compose(se2.inverse(poses[0]), poses) if len(poses) else poses


def _draw_map(ax, poses, scan_points, colour, title, stride=3):
    xs, ys = [], []
    for pose, pts in zip(poses, scan_points):
        if len(pts):
            w = se2.transform_points(pose, pts[::stride])
            xs.append(w[:, 0])
            ys.append(w[:, 1])
    if xs:
        ax.plot(np.concatenate(xs), np.concatenate(ys), ",", color=colour, alpha=0.6, rasterized=True)
    ax.plot(poses[:, 0], poses[:, 1], "-", color="#3182bd", lw=0.6, alpha=0.8)
    ax.set_title(title)
    ax.set_aspect("equal", adjustable="datalim")
    ax.set_xlabel("x (m)")
    ax.set_ylabel("y (m)")


def figure_maps(data: ReportData) -> bytes:
    import matplotlib.pyplot as plt

    fig, axes = plt.subplots(1, 2, figsize=(13, 6.2))
    _draw_map(axes[0], _anchor(data.odom), data.scan_points, ODOM_COLOUR, "Odometry only")
    _draw_map(axes[1], _anchor(data.poses), data.scan_points, MAP_COLOUR, "With verified loop closures")
    fig.tight_layout()
    out = _png(fig)
    plt.close(fig)
    return out


def _ellipse_points(cov2, centre, n_sigma, scale, n=48):
    vals, vecs = np.linalg.eigh(0.5 * (cov2 + cov2.T))
    vals = np.clip(vals, 0.0, None)
    a = np.linspace(0, 2 * np.pi, n)
    circle = np.stack([np.cos(a), np.sin(a)], -1) * (n_sigma * scale * np.sqrt(vals))
    return centre + circle @ vecs.T


def figure_loops(data: ReportData, ellipse_scale: float) -> bytes:
    import matplotlib.pyplot as plt

    poses = _anchor(data.poses)
    index = {int(i): k for k, i in enumerate(data.ids)}
    v = data.verdicts
    fig, ax = plt.subplots(figsize=(11, 8))
    ax.plot(poses[:, 0], poses[:, 1], "-", color="#9ecae1", lw=1.0, label="trajectory (optimised)")
    for accepted, colour, style, lw, label in ((False, REJECT_COLOUR, "--", 0.6, "rejected candidate"),
                                              (True, ACCEPT_COLOUR, "-", 1.2, "verified loop closure")):
        sel = np.nonzero(v.accepted == accepted)[0]
        segs = [(index[int(v.src[k])], index[int(v.dst[k])]) for k in sel
                if int(v.src[k]) in index and int(v.dst[k]) in index]
        if segs:
            a, b = np.array(segs).T
            xs = np.stack([poses[a, 0], poses[b, 0], np.full(len(a), np.nan)], 1).ravel()
            ys = np.stack([poses[a, 1], poses[b, 1], np.full(len(a), np.nan)], 1).ravel()
            ax.plot(xs, ys, style, color=colour, lw=lw, alpha=0.8 if accepted else 0.45, label=label)
    drawn = False
    for k in np.nonzero(v.accepted)[0]:
        s, d = int(v.src[k]), int(v.dst[k])
        if s not in index or d not in index or not np.isfinite(v.covariance[k]).all():
            continue
        rot = se2.rotation(poses[index[s], 2])
        cov_w = rot @ v.covariance[k][:2, :2] @ rot.T
        pts = _ellipse_points(cov_w, poses[index[d], :2], 3.0, ellipse_scale)
        ax.plot(pts[:, 0], pts[:, 1], "-", color="#54278f", lw=0.8,
                label=None if drawn else f"3-sigma position ellipse (x{ellipse_scale:g})")
        drawn = True
    ax.set_aspect("equal", adjustable="datalim")
    ax.set_xlabel("x (m)")
    ax.set_ylabel("y (m)")
    ax.legend(loc="best", fontsize=8)
    ax.set_title("Loop-closure candidates on the optimised trajectory")
    fig.tight_layout()
    out = _png(fig)
    plt.close(fig)
    return out


HISTOGRAM_FIGURES = (
    ("overlap", "overlap (fraction of points matched)"),
    ("rmse_m", "registration RMSE (m)"),
    ("ambiguity", "score gap best vs second-best"),
    ("odometry_chi2", "odometry gate, squared Mahalanobis"),
    ("pair_support", "consistent partners (PCM degree)"),
    ("graph_chi2", "residual after optimisation, squared Mahalanobis"),
)


def figure_histograms(data: ReportData) -> bytes | None:
    import matplotlib.pyplot as plt

    v = data.verdicts
    present = [(k, lab) for k, lab in HISTOGRAM_FIGURES
               if k in v.figures and np.isfinite(np.asarray(v.figures[k], float)).any()]
    if not present:
        return None
    cols = 3
    rows = -(-len(present) // cols)
    fig, axes = plt.subplots(rows, cols, figsize=(13, 3.3 * rows), squeeze=False)
    for ax, (key, label) in zip(axes.ravel(), present):
        vals = np.asarray(v.figures[key], dtype=float)
        ok = np.isfinite(vals)
        bins = np.histogram_bin_edges(vals[ok], bins=30)
        for accepted, colour, name in ((False, REJECT_COLOUR, "rejected"), (True, ACCEPT_COLOUR, "accepted")):
            sel = ok & (v.accepted == accepted)
            if sel.any():
                ax.hist(vals[sel], bins=bins, color=colour, alpha=0.6, label=name)
        ax.set_title(label, fontsize=9)
        ax.legend(fontsize=7)
    for ax in axes.ravel()[len(present):]:
        ax.axis("off")
    fig.tight_layout()
    out = _png(fig)
    plt.close(fig)
    return out


def figure_truth(data: ReportData) -> bytes | None:
    import matplotlib.pyplot as plt

    from .trajectory import align_rigid

    if data.truth is None:
        return None
    ok = np.isfinite(data.truth).all(axis=1)
    if ok.sum() < 2:
        return None
    fig, ax = plt.subplots(figsize=(9, 7))
    truth = data.truth[ok]
    ax.plot(truth[:, 0], truth[:, 1], "-", color=TRUTH_COLOUR, lw=2.2, label="ground truth")
    for poses, colour, label in ((data.odom[ok], ODOM_COLOUR, "odometry only"),
                                 (data.poses[ok], "#3182bd", "optimised")):
        al = align_rigid(poses[:, :2], truth[:, :2])
        p = poses[:, :2] @ al.rotation.T + al.translation
        ax.plot(p[:, 0], p[:, 1], "-", color=colour, lw=1.0, label=f"{label} (rigidly aligned)")
    ax.set_aspect("equal", adjustable="datalim")
    ax.legend(fontsize=8)
    ax.set_title("Trajectories against ground truth")
    ax.set_xlabel("x (m)")
    ax.set_ylabel("y (m)")
    fig.tight_layout()
    out = _png(fig)
    plt.close(fig)
    return out


_CSS = """
body{font-family:system-ui,-apple-system,Segoe UI,Helvetica,Arial,sans-serif;margin:0;color:#1d2733;background:#f6f7f9}
header{background:#1d2733;color:#fff;padding:18px 28px}
header h1{margin:0;font-size:22px} header p{margin:4px 0 0;color:#c9d3de;font-size:13px}
main{padding:12px 28px 40px;max-width:1500px}
section{background:#fff;border:1px solid #dde2e8;border-radius:6px;padding:14px 18px;margin:16px 0}
h2{font-size:17px;margin:0 0 10px}
.caution{border-left:6px solid #d9822b;background:#fff8ef}
.cards{display:flex;flex-wrap:wrap;gap:10px}
.card{border:1px solid #dde2e8;border-radius:5px;padding:8px 12px;min-width:130px}
.card b{display:block;font-size:20px} .card span{font-size:12px;color:#5b6b7c}
img{max-width:100%;height:auto}
table{border-collapse:collapse;font-size:12px}
th,td{border-bottom:1px solid #e6e9ee;padding:3px 7px;text-align:right;white-space:nowrap}
th{background:#eef1f5;cursor:pointer;position:sticky;top:0} th.sorted-asc:after{content:" \\25B2"}
th.sorted-desc:after{content:" \\25BC"} td.txt,th.txt{text-align:left}
tr.acc td.verdict{color:#1a7a43;font-weight:600} tr.rej td.verdict{color:#b0302a}
.scroll{max-height:560px;overflow:auto;border:1px solid #e6e9ee}
.kv td{text-align:left} pre{background:#f3f5f8;padding:10px;overflow:auto;font-size:12px}
"""

_SORT_JS = """
document.querySelectorAll('table.sortable').forEach(function(t){
  t.querySelectorAll('th').forEach(function(th,i){
    th.addEventListener('click',function(){
      var asc=!th.classList.contains('sorted-asc');
      t.querySelectorAll('th').forEach(function(h){h.classList.remove('sorted-asc','sorted-desc');});
      th.classList.add(asc?'sorted-asc':'sorted-desc');
      var body=t.tBodies[0], rows=Array.prototype.slice.call(body.rows);
      rows.sort(function(a,b){
        var x=a.cells[i].getAttribute('data-v')||a.cells[i].textContent,
            y=b.cells[i].getAttribute('data-v')||b.cells[i].textContent;
        var nx=parseFloat(x), ny=parseFloat(y);
        var c=(!isNaN(nx)&&!isNaN(ny))?nx-ny:x.localeCompare(y);
        return asc?c:-c;});
      rows.forEach(function(r){body.appendChild(r);});
    });
  });
});
"""


def _img(name: str, png: bytes, alt: str) -> str:
    b64 = base64.b64encode(png).decode("ascii")
    return f'<img id="{name}" alt="{html.escape(alt)}" src="data:image/png;base64,{b64}">'


def _fmt(v) -> tuple[str, str]:
    """(display text, sort key) of a table value."""
    if isinstance(v, (float, np.floating)):
        if not np.isfinite(v):
            return "", ""
        return (f"{v:.4g}", repr(float(v)))
    if isinstance(v, (bool, np.bool_)):
        return ("yes" if v else "no", "1" if v else "0")
    return (str(v), str(v))


def _candidate_table(v: VerdictTable, limit: int) -> str:
    keys = [k for k in v.figures if np.asarray(v.figures[k]).dtype.kind in "fiub"]
    head = ["from", "to", "origin", "verdict", "reason", "dx (m)", "dy (m)", "dtheta (deg)"] + keys
    txt_cols = {"origin", "verdict", "reason"}
    out = ['<table class="sortable" id="candidates"><thead><tr>']
    out += [f'<th class="{"txt" if h in txt_cols else ""}">{html.escape(h)}</th>' for h in head]
    out.append("</tr></thead><tbody>")
    order = np.lexsort((v.dst, v.src, ~v.accepted))[:limit]
    for k in order:
        d = v.delta[k]
        vals = [int(v.src[k]), int(v.dst[k]), str(v.origin[k]),
                "accepted" if v.accepted[k] else "rejected", str(v.reason[k]),
                float(d[0]), float(d[1]), float(np.degrees(d[2]))]
        vals += [np.asarray(v.figures[key])[k] for key in keys]
        cls = "acc" if v.accepted[k] else "rej"
        cells = []
        for h, val in zip(head, vals):
            text, key = _fmt(val)
            klass = "txt" if h in txt_cols else ""
            if h == "verdict":
                klass += " verdict"
            cells.append(f'<td class="{klass.strip()}" data-v="{html.escape(key)}">{html.escape(text)}</td>')
        out.append(f'<tr class="{cls}">' + "".join(cells) + "</tr>")
    out.append("</tbody></table>")
    return "".join(out)


def _kv_table(rows) -> str:
    return '<table class="kv">' + "".join(
        f"<tr><td>{html.escape(str(a))}</td><td>{html.escape(str(b))}</td></tr>" for a, b in rows) + "</table>"


def _score_section(score: dict) -> str:
    rows = []
    for key, value in score.items():
        if isinstance(value, dict):
            continue
        if isinstance(value, float):
            value = f"{value:.4g}"
        rows.append((key.replace("_", " "), value))
    return "<h2>Scoring against ground truth</h2>" + _kv_table(rows)


def build_report(out_dir, data: ReportData, *, table_limit: int = 5000) -> Path:
    """Draw the pictures and write ``report.html`` into ``out_dir``.

    Returns the report's path.  The PNGs are also written to
    ``out_dir/figures``.
    """
    import matplotlib

    matplotlib.use("Agg", force=False)
    out_dir = Path(out_dir)
    fig_dir = out_dir / "figures"
    fig_dir.mkdir(parents=True, exist_ok=True)

    v = data.verdicts
    # Ellipses of a few centimetres vanish at map scale; magnify them to a
    # readable size and say by how much in the legend.
    pos_std = [np.sqrt(np.max(np.linalg.eigvalsh(c[:2, :2]))) for c in v.covariance[v.accepted]
               if np.isfinite(c).all()]
    extent = float(np.ptp(data.poses[:, :2], axis=0).max()) if len(data.poses) else 1.0
    scale = 1.0
    if pos_std:
        scale = max(1.0, float(np.round(0.01 * extent / max(np.median(pos_std) * 3.0, 1e-6))))

    pictures = [("map", figure_maps(data), "Maps: odometry only and with verified closures")]
    pictures.append(("loops", figure_loops(data, scale), "Loop-closure candidates on the trajectory"))
    hist = figure_histograms(data)
    if hist is not None:
        pictures.append(("checks", hist, "Histograms of the check figures"))
    truth = figure_truth(data)
    if truth is not None:
        pictures.append(("truth", truth, "Trajectories against ground truth"))
    for name, png, _ in pictures:
        write_bytes(fig_dir / f"{name}.png", png)
    pics = {name: _img(name, png, alt) for name, png, alt in pictures}

    counts = v.counts()
    n_acc = int(v.accepted.sum())
    cards = [("keyframes", len(data.ids)), ("candidates", len(v)), ("verified closures", n_acc),
             ("rejected", len(v) - n_acc)]
    card_html = "".join(f'<div class="card"><b>{html.escape(str(b))}</b><span>{html.escape(a)}</span></div>'
                        for a, b in cards)
    reasons = _kv_table([(r, n) for r, n in counts.items()])
    timing = _kv_table([(k, f"{s:.2f} s") for k, s in data.timings.items()])
    parts = [
        "<!DOCTYPE html><html lang='en'><head><meta charset='utf-8'>",
        f"<title>closurecheck report: {html.escape(data.log_name)}</title>",
        f"<style>{_CSS}</style></head><body>",
        f"<header><h1>Loop-closure report: {html.escape(data.log_name)}</h1>",
        "<p>closurecheck: verified loop closures and calibrated covariances for 2D LiDAR pose graphs</p></header>",
        "<main>",
        f'<section class="caution" id="caution"><h2>Caution</h2><p>{html.escape(SAFETY_TEXT)}</p></section>',
        f'<section id="glance"><h2>At a glance</h2><div class="cards">{card_html}</div>',
        f"<div style='display:flex;gap:40px;flex-wrap:wrap;margin-top:12px'><div><h3>Verdicts by reason</h3>"
        f"{reasons}</div><div><h3>Run</h3>{_kv_table(data.summary)}</div>"
        f"<div><h3>Time per stage</h3>{timing}</div></div></section>",
        f'<section id="maps"><h2>Maps</h2><p>Every keyframe scan drawn at its pose: left with odometry alone, '
        f"right after optimising the graph with the verified closures. Doubled walls on the left are "
        f"drift; the right map should show single, sharp walls.</p>{pics['map']}</section>",
        f'<section id="loops-section"><h2>Loop closures</h2><p>Green: verified closures kept in graph.json; '
        f"red dashes: rejected candidates (see the table for the reason). Ellipses show the 3-sigma position "
        f"uncertainty of each verified closure, magnified x{scale:g}.</p>{pics['loops']}</section>",
    ]
    if "checks" in pics:
        parts.append(f'<section id="checks-section"><h2>Check figures</h2><p>How accepted and rejected '
                     f"candidates fall on each check.</p>{pics['checks']}</section>")
    if data.score:
        parts.append(f'<section id="score">{_score_section(data.score)}'
                     f"{pics.get('truth', '')}</section>")
    shown = min(len(v), table_limit)
    parts.append(f'<section id="table-section"><h2>Candidates</h2><p>{shown} of {len(v)} candidates; '
                 f"click a column heading to sort. The full list is in candidates.csv.</p>"
                 f'<div class="scroll">{_candidate_table(v, table_limit)}</div></section>')
    if data.notes:
        parts.append("<section id='notes'><h2>Notes</h2><ul>" +
                     "".join(f"<li>{html.escape(n)}</li>" for n in data.notes) + "</ul></section>")
    if data.config_text:
        parts.append(f"<section id='config'><h2>Configuration</h2><details><summary>Effective settings of "
                     f"this run (also in config.toml)</summary><pre>{html.escape(data.config_text)}</pre>"
                     f"</details></section>")
    parts.append(f"</main><script>{_SORT_JS}</script></body></html>")
    path = out_dir / "report.html"
    write_text(path, "\n".join(parts))
    return path
