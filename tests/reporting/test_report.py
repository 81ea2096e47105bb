"""The run report (closurecheck.reporting.report): a self-contained report.html.

Fast tests build a report from a small hand-made ReportData and read it back
with Python's standard HTML parser (html.parser, an outside reader of the
page), the PNG pictures with matplotlib's image reader and the page's data
with the standard base64 and json modules.  The browser tests render a real
run's report in headless Chromium: every picture decoded, the candidate
table sorts, the maps zoom, a click opens the overlay of two scans, and the
decision buttons write rows; they save screenshots.
"""

from __future__ import annotations

import base64
import csv
import html
import json
import math
import os
import shutil
import subprocess
from html.parser import HTMLParser
from pathlib import Path

import numpy as np
import pytest

from closurecheck.reporting import report
from closurecheck.reporting.report import (
    SAFETY_TEXT,
    ReportData,
    build_report,
    check_thresholds,
    histogram_edges,
)
from closurecheck.verification.verdicts import VerdictTable

# PNG signature: the first 8 bytes of every PNG file (PNG specification,
# W3C / ISO/IEC 15948, section 5.2).
PNG_MAGIC = b"\x89PNG\r\n\x1a\n"


# ---------------------------------------------------------------------------
# A small hand-made run: 8 keyframes around a 10 m x 6 m room.

def _room_points(pose, rng):
    """Returns of a rectangular room's walls, in the robot frame of ``pose``."""
    walls = []
    for x in np.linspace(-1, 11, 60):
        walls += [(x, -1.0), (x, 7.0)]
    for y in np.linspace(-1, 7, 40):
        walls += [(-1.0, y), (11.0, y)]
    world = np.array(walls)
    c, s = math.cos(pose[2]), math.sin(pose[2])
    local = (world - pose[:2]) @ np.array([[c, -s], [s, c]])
    return local + rng.normal(0, 0.01, local.shape)


def _data(log_name="room.jsonl", accepted=(True, True, False, False, False), score=True, reasons=None):
    rng = np.random.default_rng(4)
    poses = np.array([[0, 0, 0], [4, 0, 0], [8, 0, 1.57], [8, 4, 1.57], [8, 6, 3.14], [4, 6, 3.14],
                      [0, 6, -1.57], [0, 2, -1.57]], float)
    odom = poses + np.array([[0.02 * k, 0.05 * k, 0.01 * k] for k in range(len(poses))])
    ids = np.arange(0, 40, 5)
    n = len(accepted)
    src = np.array([35, 30, 25, 5, 15])[:n]
    dst = np.array([0, 5, 10, 20, 35])[:n]
    acc = np.array(accepted, bool)
    if reasons is None:
        reasons = ["accepted" if a else r for a, r in zip(acc, ["pair_inconsistent", "pair_inconsistent", "odometry_gate", "low_overlap",
                                                               "pair_inconsistent"])]
    cov = np.tile(np.diag([0.02 ** 2, 0.05 ** 2, 0.01 ** 2]), (n, 1, 1))
    cov[~acc] = np.nan
    table = VerdictTable(
        src=src, dst=dst, origin=np.array(["descriptor", "proximity", "descriptor", "proximity",
                                           "descriptor+proximity"][:n], dtype=object),
        accepted=acc, reason=np.array(reasons, dtype=object),
        delta=np.array([[0.1, 0.2, 0.03], [-0.2, 0.1, -0.01], [3.0, -2.0, 1.0], [np.nan] * 3, [0.5, 0.5, 0.1]])[:n],
        covariance=cov,
        figures={"overlap": np.array([0.8, 0.75, 0.6, 0.1, 0.7])[:n],
                 "rmse_m": np.array([0.01, 0.012, 0.02, np.nan, 0.015])[:n],
                 "odometry_chi2": np.array([2.0, 4.0, 5.0e5, np.nan, 3.0])[:n],
                 "odometry_informative": np.array([True, True, True, False, True])[:n]})
    scan_points = [_room_points(p, rng) for p in poses]
    s = None
    if score:
        s = {"candidates": n, "accepted": int(acc.sum()), "false_closures": 0, "closure_precision": 1.0,
             "revisit_events": 3, "revisit_events_closed": 2, "revisit_event_recall": 2 / 3,
             "ate_odometry_m": 0.412, "ate_optimised_m": 0.0374, "ate_ratio": 0.09,
             "rpe_5m_odometry_m": 0.21, "rpe_5m_optimised_m": 0.031, "nees_mean": 2.9,
             "a_figure_the_page_does_not_know": 7.25}
    return ReportData(log_name=log_name, ids=ids, odom=odom, poses=poses, scan_points=scan_points,
                      verdicts=table, summary=[("keyframes", len(ids)), ("largest map correction", "0.35 m")],
                      timings={"registration": 1.5, "verification": 0.25}, score=s,
                      truth=poses.copy() if score else None, config_text="[verify]\nmin_overlap = 0.3\n",
                      notes=["a note for the reader"],
                      thresholds={"overlap": 0.3, "odometry_chi2": 16.27})


class _Page(HTMLParser):
    """The parts of report.html the tests look at, as read by html.parser."""

    def __init__(self):
        super().__init__(convert_charrefs=True)
        self.imgs = {}
        self.tables = {}
        self.scripts = []
        self.links = []
        self.text = []
        self.title = ""
        self._table = None
        self._row = None
        self._cell = None
        self._in = []

    def handle_starttag(self, tag, attrs):
        a = dict(attrs)
        self._in.append(tag)
        if tag == "img":
            self.imgs[a.get("id")] = a
        elif tag == "table":
            self._table = {"attrs": a, "head": [], "rows": []}
            self.tables[a.get("id") or f"table{len(self.tables)}"] = self._table
        elif tag == "tr" and self._table is not None:
            self._row = {"attrs": a, "cells": []}
        elif tag in ("td", "th") and self._row is not None:
            self._cell = {"tag": tag, "attrs": a, "text": ""}
        elif tag == "script":
            self.scripts.append(a)
        elif tag == "link":
            self.links.append(a)

    def handle_endtag(self, tag):
        if self._in and self._in[-1] == tag:
            self._in.pop()
        if tag in ("td", "th") and self._cell is not None:
            self._row["cells"].append(self._cell)
            self._cell = None
        elif tag == "tr" and self._row is not None:
            if all(c["tag"] == "th" for c in self._row["cells"]) and not self._table["rows"]:
                self._table["head"] = [c["text"] for c in self._row["cells"]]
            else:
                self._table["rows"].append(self._row)
            self._row = None
        elif tag == "table":
            self._table = None

    def handle_data(self, data):
        if self._cell is not None:
            self._cell["text"] += data
        if self._in and self._in[-1] == "title":
            self.title += data
        if not (self._in and self._in[-1] in ("script", "style")):
            self.text.append(data)


def _parse(path) -> tuple[str, _Page]:
    text = Path(path).read_text(encoding="utf-8")
    page = _Page()
    page.feed(text)
    return text, page


@pytest.fixture(scope="module")
def built(tmp_path_factory):
    out = tmp_path_factory.mktemp("report")
    data = _data(log_name='aisle <7> & "north" wing')
    path = build_report(out, data)
    text, page = _parse(path)
    return {"out": out, "data": data, "path": path, "text": text, "page": page}


def test_report_file_is_written(built):
    assert built["path"] == built["out"] / "report.html"
    assert built["path"].stat().st_size > 10_000


def test_report_is_self_contained(built):
    text, page = built["text"], built["page"]
    assert "http://" not in text and "https://" not in text
    assert not page.links, "no external style sheets"
    assert all("src" not in s for s in page.scripts), "no external scripts"
    assert "import(" not in text and "fetch(" not in text and "XMLHttpRequest" not in text
    assert page.imgs
    for a in page.imgs.values():
        assert a["src"].startswith("data:image/png;base64,")


def test_caution_text_is_on_the_page(built):
    words = " ".join(" ".join(built["page"].text).split())
    assert SAFETY_TEXT in words


def test_pictures_are_embedded_and_match_the_files(built):
    import matplotlib.image as mpimg

    page, fig_dir = built["page"], built["out"] / "figures"
    # The maps are drawn by the page from its data (zoomable); their static pictures are files only.
    assert "map" not in page.imgs and "loops" not in page.imgs
    for name in ("checks", "truth"):
        assert name in page.imgs, f"picture {name} missing"
        png = base64.b64decode(page.imgs[name]["src"].split(",", 1)[1], validate=True)
        assert png[:8] == PNG_MAGIC
        assert png == (fig_dir / f"{name}.png").read_bytes()
        assert page.imgs[name].get("alt")
    pixels = mpimg.imread(fig_dir / "map.png")
    assert pixels.ndim == 3 and pixels.shape[0] > 200 and pixels.shape[1] > 400
    # Not a blank canvas: the scans and axes put dark pixels on the white page.
    assert (pixels[..., :3].mean(axis=2) < 0.5).mean() > 0.001


def test_every_figure_file_is_a_valid_png(built):
    import matplotlib.image as mpimg

    files = sorted((built["out"] / "figures").glob("*.png"))
    assert {f.stem for f in files} == {"map", "loops", "checks", "truth"}
    for f in files:
        assert f.read_bytes()[:8] == PNG_MAGIC, f.name
        img = mpimg.imread(f)  # matplotlib's reader (Pillow) as the reference decoder
        assert img.ndim == 3 and img.shape[2] in (3, 4) and min(img.shape[:2]) > 100


def test_log_name_is_escaped(built):
    text, page = built["text"], built["page"]
    raw = 'aisle <7> & "north" wing'
    assert raw not in text
    assert "<7>" not in text
    assert html.escape(raw) in text
    assert page.title == f"closurecheck report: {raw}"


def test_candidate_table_has_one_row_per_candidate(built):
    v = built["data"].verdicts
    table = built["page"].tables["candidates"]
    assert "sortable" in table["attrs"]["class"].split()
    assert table["head"][:5] == ["from", "to", "origin", "verdict", "reason"]
    assert {"overlap", "rmse_m", "odometry_chi2", "odometry_informative"} <= set(table["head"])
    rows = table["rows"]
    assert len(rows) == len(v)
    got = sorted((int(r["cells"][0]["text"]), int(r["cells"][1]["text"]), r["cells"][3]["text"],
                  r["cells"][4]["text"]) for r in rows)
    want = sorted((int(s), int(d), "accepted" if a else "rejected", str(reason))
                  for s, d, a, reason in zip(v.src, v.dst, v.accepted, v.reason))
    assert got == want
    # Verified first, and the row class carries the verdict for the colours.
    verdicts = [r["cells"][3]["text"] for r in rows]
    assert verdicts == sorted(verdicts)
    assert [r["attrs"]["class"] for r in rows] == ["acc" if x == "accepted" else "rej" for x in verdicts]


def test_table_sort_keys_carry_the_full_values(built):
    """The sort script orders by data-v; it must be the exact number behind the shortened text."""
    v = built["data"].verdicts
    table = built["page"].tables["candidates"]
    col = table["head"].index("dtheta (deg)")
    by_pair = {(int(s), int(d)): k for k, (s, d) in enumerate(zip(v.src, v.dst))}
    for r in table["rows"]:
        k = by_pair[(int(r["cells"][0]["text"]), int(r["cells"][1]["text"]))]
        key = r["cells"][col]["attrs"]["data-v"]
        want = math.degrees(v.delta[k, 2])
        if np.isfinite(want):
            assert float(key) == pytest.approx(want, rel=1e-12)
            assert float(r["cells"][col]["text"]) == pytest.approx(want, rel=1e-3)
        else:
            assert key == "" and r["cells"][col]["text"] == ""


@pytest.mark.parametrize("values", [
    np.array([True, False, True]),
    np.array([3, -7, 0], dtype=np.int32),
    np.array([7, 255, 0], dtype=np.uint8),
    np.array([0.1, np.nan, -np.inf, 1e12, 2.5e-7]),
    np.array([0.1, np.nan, 3.25], dtype=np.float32),
    np.array(["accepted", "odometry_gate", "accepted"]),
    np.array(["", "a <b> & 'c' \"d\"", 1.5, None, True], dtype=object),
], ids=["bool", "int32", "uint8", "float64", "float32", "str", "object"])
def test_table_cells_a_column_at_a_time_match_the_cell_by_cell_format(values):
    """The column formatter must write what formatting each value alone (report._fmt) and escaping
    it with the standard library's html.escape writes."""
    want = []
    for v in values:
        text, key = report._fmt(v)
        want.append(f'<td class="txt" data-v="{html.escape(key)}">{html.escape(text)}</td>')
    assert report._column_cells(values, "txt") == want


def test_table_limit_keeps_the_verified_first(tmp_path):
    data = _data(accepted=(True, False, True, False, False), score=False)
    _, page = _parse(build_report(tmp_path, data, table_limit=2))
    rows = page.tables["candidates"]["rows"]
    assert [r["cells"][3]["text"] for r in rows] == ["accepted", "accepted"]
    assert "2 of 5 candidates" in " ".join(page.text)


def test_reason_counts_match_the_verdicts(built):
    v = built["data"].verdicts
    rows = built["page"].tables["reasons"]["rows"]
    got = {r["cells"][0]["text"]: int(r["cells"][1]["text"]) for r in rows}
    assert got == v.counts()


def test_unknown_reason_code_is_an_error():
    # A misspelt code must not silently vanish from the counts.
    with pytest.raises(ValueError, match="unknown reason code 'some_new_check'"):
        _data(accepted=(True, False), score=False, reasons=["accepted", "some_new_check"])


def test_score_section_shows_every_figure(built):
    page = built["page"]
    traj = page.tables["trajectory-error"]
    rows = {r["cells"][0]["text"]: (r["cells"][1]["text"], r["cells"][2]["text"]) for r in traj["rows"]}
    assert rows["ATE after rigid alignment"] == ("0.412", "0.0374")
    assert rows["RPE over 5 m"] == ("0.21", "0.031")
    words = " ".join(page.text)
    assert "a figure the page does not know" in words and "7.25" in words
    assert "false closures (truth)" in words


def test_false_closures_are_flagged(tmp_path):
    data = _data()
    score = dict(data.score, false_closures=1, false_closure_pairs=[[35, 0]])
    import dataclasses

    text, page = _parse(build_report(tmp_path, dataclasses.replace(data, score=score)))
    assert 'class="card bad"' in text
    assert "35-0" in " ".join(page.text)


def test_without_truth_there_is_no_scoring_section(tmp_path):
    text, page = _parse(build_report(tmp_path, _data(score=False)))
    assert "truth" not in page.imgs and 'id="score"' not in text
    assert not (tmp_path / "figures" / "truth.png").exists()


def _green_fraction(png_path):
    import matplotlib.image as mpimg

    rgb = mpimg.imread(png_path)[..., :3]
    return float(((rgb[..., 1] - rgb[..., 0] > 0.2) & (rgb[..., 1] - rgb[..., 2] > 0.1)).mean())


def test_loop_picture_tells_verified_from_rejected(tmp_path):
    """Verified closures are drawn green, rejected ones never: with no verified
    closure the picture has no green at all."""
    build_report(tmp_path / "some", _data(accepted=(True, True, False, False, False), score=False))
    build_report(tmp_path / "none", _data(accepted=(False,) * 5, score=False,
                                          reasons=["odometry_gate", "low_overlap", "odometry_gate",
                                                   "low_overlap", "pair_inconsistent"]))
    assert _green_fraction(tmp_path / "some" / "figures" / "loops.png") > 1e-4
    assert _green_fraction(tmp_path / "none" / "figures" / "loops.png") == 0.0


def test_ellipse_points_lie_on_the_mahalanobis_contour():
    # Definition of the Mahalanobis distance (Mahalanobis 1936): the n-sigma
    # contour of N(c, C) is {p : (p - c)^T C^-1 (p - c) = n^2}.
    rng = np.random.default_rng(2)
    a = rng.normal(size=(2, 2))
    cov = a @ a.T + 0.1 * np.eye(2)
    centre = np.array([3.0, -1.0])
    pts = report._ellipse_points(cov, centre, 3.0, 2.0)
    e = pts - centre
    d2 = np.einsum("ni,ni->n", e, np.linalg.solve(cov, e.T).T)
    np.testing.assert_allclose(d2, (3.0 * 2.0) ** 2, rtol=1e-9)


def _with_covariance_scale(data, factor):
    import dataclasses

    return dataclasses.replace(data, verdicts=dataclasses.replace(
        data.verdicts, covariance=data.verdicts.covariance * factor))


def test_ellipse_magnification_is_a_round_number_that_makes_ellipses_visible():
    # Largest std 0.05 m scaled to 0.5 mm: its 3-sigma ellipse (1.5 mm) would
    # vanish on the 8 m map.
    data = _with_covariance_scale(_data(), 1e-4)
    m = report.ellipse_magnification(data)
    mantissa = m / 10 ** math.floor(math.log10(m))
    assert mantissa in (1.0, 2.0, 5.0)
    # Magnified, the median ellipse lands between the target fraction of
    # the map (0.6 % of 8 m) and 2.5 times less (rounding down to 1-2-5).
    size = 3 * 0.0005 * m
    assert 0.006 * 8.0 / 2.5 <= size <= 0.006 * 8.0 * 1.0001
    # Ellipses already visible are never shrunk.
    assert report.ellipse_magnification(_with_covariance_scale(_data(), 100.0)) == 1.0


def test_heavy_tailed_figures_get_log_bins():
    rng = np.random.default_rng(0)
    # chi-square(3) for right candidates, huge values for wrong ones
    vals = np.concatenate([rng.chisquare(3, 400), rng.uniform(1e3, 1e6, 100)])
    edges, log_scale = histogram_edges(vals, threshold=16.27)
    assert log_scale
    np.testing.assert_allclose(np.diff(np.log(edges)), np.log(edges[1] / edges[0]), rtol=1e-9)
    assert edges[0] <= 16.27 <= edges[-1]
    assert edges[-1] >= vals.max() * (1 - 1e-12)


def test_a_far_outlier_does_not_squeeze_the_bulk():
    rng = np.random.default_rng(1)
    vals = np.concatenate([rng.normal(0.0, 1.0, 2000), [60.0, 80.0]])
    edges, log_scale = histogram_edges(vals)
    assert not log_scale
    bulk = np.quantile(vals, [0.01, 0.99])
    # The central 98 % spans most of the axis, not one bar of it.
    assert (bulk[1] - bulk[0]) / (edges[-1] - edges[0]) > 0.7
    # numpy's own binning of the same values squeezes the bulk (the reason for clipping).
    ref = np.histogram_bin_edges(vals, bins=len(edges) - 1)
    assert (bulk[1] - bulk[0]) / (ref[-1] - ref[0]) < 0.1


def test_threshold_outside_the_values_is_still_on_the_axis():
    edges, log_scale = histogram_edges(np.linspace(0.5, 0.9, 50), threshold=0.3)
    assert not log_scale and edges[0] < 0.3 < edges[-1]


def test_constant_values_give_a_usable_range():
    edges, _ = histogram_edges(np.full(10, 4.0))
    assert edges[0] < 4.0 < edges[-1] and np.all(np.diff(edges) > 0)


def test_check_thresholds_use_the_chi_square_quantile():
    from closurecheck.verification.verify import VerifyOptions

    t = check_thresholds(VerifyOptions(gate_probability=0.999, residual_probability=0.99, min_overlap=0.4))
    # Upper critical values of chi-square, 3 degrees of freedom: 16.266 at
    # 0.999 and 11.345 at 0.99 (NIST/SEMATECH e-Handbook of Statistical
    # Methods, table 1.3.6.7.4).
    assert t["odometry_chi2"] == pytest.approx(16.266, abs=1e-3)
    assert t["graph_chi2"] == pytest.approx(11.345, abs=1e-3)
    assert t["overlap"] == 0.4


def test_thresholds_are_optional(tmp_path):
    import dataclasses

    path = build_report(tmp_path, dataclasses.replace(_data(), thresholds={}))
    text, page = _parse(path)
    assert "checks" in page.imgs and "bounds of this run" not in text


# ---------------------------------------------------------------------------
# Headless Chromium: a real run's report as a browser shows it.

CHROMIUM_FLAGS = ["--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
                  "--disable-background-networking", "--disable-component-update", "--disable-sync",
                  "--disable-dev-shm-usage", "--hide-scrollbars", "--window-size=1400,3000"]

# Runs inside a copy of the report once everything (pictures included) has
# loaded, and writes what it found into the page for --dump-dom.
CHECK_SCRIPT = """
<script>
window.addEventListener('load', function(){
  var out = {images: [], errors: []};
  try {
    Array.prototype.forEach.call(document.images, function(i){
      out.images.push({id: i.id, complete: i.complete, natural: i.naturalWidth, shown: i.getBoundingClientRect().width});
    });
    var t = document.getElementById('candidates');
    var heads = Array.prototype.map.call(t.tHead.rows[0].cells, function(c){ return c.textContent; });
    function col(name){
      var i = heads.indexOf(name);
      return Array.prototype.map.call(t.tBodies[0].rows, function(r){ return r.cells[i].textContent; });
    }
    function click(name){ t.tHead.rows[0].cells[heads.indexOf(name)].click(); }
    out.heads = heads;
    out.before = col('from');
    click('from'); out.from_asc = col('from');
    click('from'); out.from_desc = col('from');
    click('reason'); out.reason_asc = col('reason');
    out.page_overflow_px = document.documentElement.scrollWidth - window.innerWidth;
  } catch (e) { out.errors.push(String(e)); }
  var pre = document.createElement('pre');
  pre.id = 'check-result';
  pre.textContent = JSON.stringify(out);
  document.body.appendChild(pre);
});
</script>
"""


def _chromium():
    for name in ("chromium", "chromium-browser"):
        path = shutil.which(name)
        if path:
            return path
    return None


def _run_chromium(binary, profile, args, timeout=180):
    cmd = [binary, *CHROMIUM_FLAGS, f"--user-data-dir={profile}", *args]
    return subprocess.run(cmd, capture_output=True, text=True, timeout=timeout,
                          env=dict(os.environ, LANG="C.UTF-8"))


def _report_data(text):
    start = text.index("<script type='application/json' id='report-data'>")
    start = text.index(">", start) + 1
    return json.loads(text[start:text.index("</script>", start)])


def test_page_carries_every_scan_to_the_centimetre(built):
    data = built["data"]
    d = _report_data(built["text"])
    pts = np.frombuffer(base64.b64decode(d["scans"]["points"]), "<i2").reshape(-1, 2) / 100.0
    off = d["scans"]["offsets"]
    assert len(off) == len(data.ids) + 1
    for k, want in enumerate(data.scan_points):
        got = pts[off[k]:off[k + 1]]
        assert got.shape == want.shape
        assert np.abs(got - want).max() <= 0.005 + 1e-12
    assert d["ids"] == [int(i) for i in data.ids]
    # Poses in the maps' frame: the first keyframe at the origin.
    poses = np.frombuffer(base64.b64decode(d["poses"]), "<f4").reshape(-1, 3)
    np.testing.assert_allclose(poses[0], 0.0, atol=1e-6)
    np.testing.assert_allclose(np.hypot(*np.diff(poses[:, :2], axis=0).T),
                               np.hypot(*np.diff(data.poses[:, :2], axis=0).T), rtol=1e-5)


def test_page_carries_every_candidate_for_its_overlay(built):
    v = built["data"].verdicts
    c = _report_data(built["text"])["cands"]
    ids = _report_data(built["text"])["ids"]
    assert [ids[i] for i in c["src"]] == v.src.tolist() and [ids[i] for i in c["dst"]] == v.dst.tolist()
    assert c["acc"] == [int(a) for a in v.accepted]
    delta = np.frombuffer(base64.b64decode(c["delta"]), "<f4").reshape(-1, 3)
    np.testing.assert_allclose(delta, v.delta.astype(np.float32), equal_nan=True)
    assert c["figs"]["overlap"] == pytest.approx(v.figures["overlap"].tolist(), rel=1e-3)
    # Every table row opens the candidate it shows.
    rows = built["page"].tables["candidates"]["rows"]
    for r in rows:
        k = int(r["attrs"]["data-k"])
        assert (int(r["cells"][0]["text"]), int(r["cells"][1]["text"])) == (int(v.src[k]), int(v.dst[k]))


def test_close_calls_are_the_least_and_the_most_sure(built):
    from closurecheck.verification.margins import decision_margins

    data = built["data"]
    m = decision_margins(data.verdicts.reason, data.verdicts.figures, data.thresholds)
    acc, rej = report.close_calls(data.verdicts, m)
    assert np.all(np.diff(m.value[acc]) >= 0) and np.all(np.diff(m.value[rej]) <= 0)
    assert np.all(m.value[acc] >= 0) and np.all(m.value[rej] < 0)
    text = built["text"]
    for k in list(acc) + list(rej):
        assert f"class='call' data-k='{int(k)}'" in text
    # Only verdicts decided by a bound have a margin: the low-overlap one (overlap 0.1 against 0.3) does,
    # the table shows its margin.
    k = int(np.flatnonzero(data.verdicts.reason == "low_overlap")[0])
    assert m.value[k] == pytest.approx((0.1 - 0.3) / 0.3)
    assert k in rej


def test_decisions_area_and_overlay_panel_are_on_the_page(built):
    text = built["text"]
    assert "id='decisions-text'" in text and "from,to,decision,note" in text
    assert "id='overlay-panel'" in text and "id='overlay-registered'" in text and "id='overlay-odometry'" in text
    assert "--decisions" in text


def test_moving_things_are_named_in_the_map_caption(built):
    words = " ".join(" ".join(built["page"].text).split())
    assert "single and sharp" in words and "people, carts and other things that moved" in words


def test_truth_is_drawn_in_the_maps_frame():
    """A truth kept in a floor-plan frame turned 180 degrees and shifted lands on the maps' trajectory."""
    import dataclasses

    data = _data()
    floor = np.array([12.0, -3.0, math.pi])
    truth = report.se2.compose(np.broadcast_to(floor, data.poses.shape), data.poses)
    truth, odo, optimised = report.trajectories_in_map_frame(dataclasses.replace(data, truth=truth))
    np.testing.assert_allclose(optimised[0], 0.0, atol=1e-12)
    np.testing.assert_allclose(truth, optimised, atol=1e-9)
    # The odometry is rigidly aligned onto that truth: its RMS error is the ATE (closurecheck.reporting.trajectory).
    from closurecheck.reporting.trajectory import ate_rmse

    rms = np.sqrt(np.mean(np.sum((odo - truth) ** 2, axis=1)))
    assert rms == pytest.approx(ate_rmse(data.odom, data.poses), rel=1e-9)


@pytest.fixture(scope="module")
def real_run(e2e_run, tmp_path_factory):
    if _chromium() is None:
        pytest.skip("headless Chromium not found (install the Debian package 'chromium'; scripts/test.sh does)")
    _, _, out = e2e_run
    return tmp_path_factory.mktemp("browser"), out


@pytest.mark.browser
@pytest.mark.slow
def test_report_renders_in_headless_chromium(real_run):
    import matplotlib.image as mpimg

    base, out = real_run
    binary = _chromium()
    report_html = (out / "report.html").read_text(encoding="utf-8")
    with open(out / "candidates.csv", newline="", encoding="utf-8") as fh:
        n_candidates = sum(1 for _ in csv.DictReader(fh))
    assert n_candidates > 2

    # The checks run in a copy beside the original, so the report itself
    # carries no test code.
    probe = out / "report_probe.html"
    probe.write_text(report_html.replace("</body>", CHECK_SCRIPT + "</body>"), encoding="utf-8")
    res = _run_chromium(binary, base / "profile-dom", ["--virtual-time-budget=20000", "--dump-dom",
                                                       probe.resolve().as_uri()])
    assert res.returncode == 0, res.stderr[-2000:]
    start = res.stdout.find('<pre id="check-result">')
    assert start >= 0, "the check script did not run: " + res.stderr[-2000:]
    found = json.loads(html.unescape(res.stdout[start + len('<pre id="check-result">'):
                                                res.stdout.index("</pre>", start)]))
    assert found["errors"] == []

    ids = {i["id"] for i in found["images"]}
    assert {"checks", "truth", "nees"} <= ids
    for img in found["images"]:
        assert img["complete"] and img["natural"] > 0, f"picture {img['id']} did not decode"
        assert img["shown"] > 300, f"picture {img['id']} is drawn {img['shown']} px wide"
    assert found["page_overflow_px"] <= 0, "the page scrolls sideways at 1400 px"

    assert len(found["before"]) == n_candidates
    asc = [int(x) for x in found["from_asc"]]
    desc = [int(x) for x in found["from_desc"]]
    assert sorted(asc) == sorted(int(x) for x in found["before"])
    assert asc == sorted(asc) and desc == sorted(desc, reverse=True)
    assert asc != desc, "clicking the heading again must reverse the order"
    assert found["from_asc"] != found["before"], "sorting by 'from' must change the verified-first order"
    assert found["reason_asc"] == sorted(found["reason_asc"])

    shot = base / "report.png"
    res = _run_chromium(binary, base / "profile-shot", [f"--screenshot={shot}",
                                                        (out / "report.html").resolve().as_uri()])
    assert res.returncode == 0 and shot.exists(), res.stderr[-2000:]
    assert shot.read_bytes()[:8] == PNG_MAGIC
    pixels = mpimg.imread(shot)
    assert pixels.shape[:2] == (3000, 1400)
    assert pixels[..., :3].std() > 0.05, "the screenshot is blank"
    print(f"screenshot: {shot}")


# Drives the page's own controls the way a reader does (wheel, click on a closure line, the decision buttons, a
# table row) and writes what it saw into the page for --dump-dom.
INTERACT_SCRIPT = """
<script>
window.addEventListener('load', function(){
  var out = {errors: []};
  function inked(view){
    var c = view.canvas, d = c.getContext('2d').getImageData(0, 0, c.width, c.height).data, n = 0;
    for (var i = 0; i < d.length; i += 4) if (d[i] < 200 || d[i + 1] < 200 || d[i + 2] < 200) n++;
    return n / (c.width * c.height);
  }
  try {
    var cc = window.closurecheck, v = cc.views['map-optimised'], o = cc.views['map-odometry'];
    v.draw(); o.draw();
    out.map_inked = inked(v);
    var s0 = v.cam.s, x0 = v.cam.x, before = v.canvas.toDataURL(), r = v.canvas.getBoundingClientRect();
    v.canvas.dispatchEvent(new WheelEvent('wheel', {deltaY: -600, clientX: r.left + r.width * 0.7,
                                                    clientY: r.top + r.height * 0.5, bubbles: true, cancelable: true}));
    v.draw(); o.draw();
    out.zoom = v.cam.s / s0;
    out.centre_moved = v.cam.x !== x0;
    out.pixels_changed = v.canvas.toDataURL() !== before;
    out.linked = o.cam.s === v.cam.s;
    var lv = cc.views['loops-verified']; lv.draw();
    out.segments = lv.segments.length;
    var seg = lv.segments[Math.floor(lv.segments.length / 2)], rr = lv.canvas.getBoundingClientRect();
    var px = rr.left + (seg[1] + seg[3]) / 2, py = rr.top + (seg[2] + seg[4]) / 2;
    var panel = document.getElementById('overlay-panel');
    out.hidden_before = panel.hidden;
    lv.canvas.dispatchEvent(new PointerEvent('pointerdown', {clientX: px, clientY: py, bubbles: true, pointerId: 1}));
    lv.canvas.dispatchEvent(new PointerEvent('pointerup', {clientX: px, clientY: py, bubbles: true, pointerId: 1}));
    out.hidden_after = panel.hidden;
    var reg = cc.views['overlay-registered'], odo = cc.views['overlay-odometry'];
    reg.draw(); odo.draw();
    out.opened = reg.k;
    out.title = panel.querySelector('.otitle').textContent;
    out.figures = panel.querySelectorAll('.ofigs tr').length;
    out.overlay_inked = inked(reg);
    out.odometry_inked = inked(odo);
    panel.querySelector('input.onote').value = 'walls, line up';
    panel.querySelector('button[data-decision=reject]').click();
    panel.querySelector('button[data-decision=accept]').click();
    out.decisions = document.getElementById('decisions-text').value;
    panel.querySelector('.oclose').click();
    out.closed = panel.hidden;
    var row = document.querySelector('#candidates tbody tr:nth-child(2)');
    row.click();
    out.row_k = +row.getAttribute('data-k');
    out.row_opened = cc.views['overlay-registered'].k;
    out.row_from = row.cells[0].textContent; out.row_to = row.cells[1].textContent;
    out.row_title = panel.querySelector('.otitle').textContent;
    out.calls = document.querySelectorAll('.call').length;
    var call = document.querySelector('.call');
    if (call) { var cv = cc.views['call-' + call.getAttribute('data-k')]; cv.draw(); out.call_inked = inked(cv); }
  } catch (e) { out.errors.push(String(e) + ' ' + (e.stack || '')); }
  var pre = document.createElement('pre');
  pre.id = 'check-result';
  pre.textContent = JSON.stringify(out);
  document.body.appendChild(pre);
});
</script>
"""

# Opens the overlay of the first close call for the screenshot.
SHOW_OVERLAY = """
<script>
window.addEventListener('load', function(){
  var call = document.querySelector('#calls-rejected .call') || document.querySelector('.call');
  window.closurecheck.openCandidate(+(call ? call.getAttribute('data-k') : 0));
});
</script>
"""


def _probe(binary, base, out, script, name):
    probe = out / f"{name}.html"
    probe.write_text((out / "report.html").read_text(encoding="utf-8").replace("</body>", script + "</body>"),
                     encoding="utf-8")
    res = _run_chromium(binary, base / f"profile-{name}", ["--virtual-time-budget=20000", "--dump-dom",
                                                           probe.resolve().as_uri()])
    assert res.returncode == 0, res.stderr[-2000:]
    start = res.stdout.find('<pre id="check-result">')
    assert start >= 0, "the check script did not run: " + res.stderr[-2000:]
    return json.loads(html.unescape(res.stdout[start + len('<pre id="check-result">'):
                                                res.stdout.index("</pre>", start)]))


@pytest.mark.browser
@pytest.mark.slow
def test_maps_zoom_and_a_click_opens_the_overlay_in_headless_chromium(real_run):
    import matplotlib.image as mpimg

    base, out = real_run
    binary = _chromium()
    found = _probe(binary, base, out, INTERACT_SCRIPT, "interact")
    assert found["errors"] == []
    assert found["map_inked"] > 0.002, "the map canvas shows no scans"
    # Zoom: the wheel scales the view about the cursor, the pixels change, the linked map follows.
    assert found["zoom"] > 1.5 and found["centre_moved"] and found["pixels_changed"] and found["linked"]
    # A click on a verified closure's line opens its overlay, both views drawn.
    assert found["segments"] > 0
    assert found["hidden_before"] is True and found["hidden_after"] is False
    assert found["opened"] >= 0 and found["figures"] >= 3
    assert found["overlay_inked"] > 0.001 and found["odometry_inked"] > 0.001
    # The decision buttons write one row per pair (the later button replaces the earlier row), note quoted.
    lines = found["decisions"].strip().splitlines()
    assert lines[0] == "from,to,decision,note" and len(lines) == 2
    row = next(csv.reader([lines[1]]))
    assert row[2:] == ["accept", "walls, line up"] and found["title"].startswith(f"scans {row[0]} ")
    assert found["closed"] is True
    # A table row opens the candidate it shows.
    assert found["row_opened"] == found["row_k"]
    assert found["row_title"].startswith(f"scans {found['row_from']} (from") and found["row_to"] in found["row_title"]
    assert found["calls"] > 0 and found["call_inked"] > 0.001

    shot = base / "overlay.png"
    probe = out / "overlay.html"
    probe.write_text((out / "report.html").read_text(encoding="utf-8").replace("</body>", SHOW_OVERLAY + "</body>"),
                     encoding="utf-8")
    res = _run_chromium(binary, base / "profile-overlay", ["--virtual-time-budget=20000", f"--screenshot={shot}",
                                                           "--window-size=1400,900", probe.resolve().as_uri()])
    assert res.returncode == 0 and shot.exists(), res.stderr[-2000:]
    pixels = mpimg.imread(shot)
    assert pixels[..., :3].std() > 0.05, "the screenshot is blank"
    print(f"overlay screenshot: {shot}")
