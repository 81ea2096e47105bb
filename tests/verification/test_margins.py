"""Margins of verdicts (closurecheck.verification.margins, docs/verification.md "Margins").

Hand-made figures check each reason's rule; the shared e2e run checks a
property any correct implementation has: a margin's sign agrees with the
verdict (accepted >= 0, rejected by a bound < 0).
"""

import csv
import math

import numpy as np
import pytest

from closurecheck.verification.margins import check_bounds, decision_margins
from closurecheck.verification.verify import VerifyOptions

BOUNDS = {"overlap": 0.3, "rmse_m": 0.08, "ambiguity": 0.95, "odometry_chi2": 16.0, "map_chi2": 16.0,
          "map_std_m": 0.25, "gnc_weight": 0.5, "graph_chi2": 9.0}


def _figures(**columns):
    n = len(next(iter(columns.values())))
    names = ("overlap", "rmse_m", "ambiguity", "odometry_chi2", "map_chi2", "map_std_m", "gnc_weight", "graph_chi2")
    out = {k: np.full(n, np.nan) for k in names}
    out["odometry_informative"] = np.ones(n, bool)
    for k, v in columns.items():
        out[k] = np.asarray(v, dtype=bool if k == "odometry_informative" else float)
    return out


def test_each_rejection_is_measured_against_its_own_check():
    reason = np.array(["low_overlap", "high_rmse", "ambiguous", "odometry_gate", "odometry_gate", "graph_residual",
                       "graph_residual", "pair_inconsistent", "pair_inconsistent", "no_points", "reviewer_rejected"])
    nan = math.nan
    f = _figures(overlap=[0.15, .5, .5, .5, .5, .5, .5, .5, .5, nan, .5],
                 rmse_m=[.01, 0.1, .01, .01, .01, .01, .01, .01, .01, nan, .01],
                 ambiguity=[.5, .5, 0.99, .5, .5, .5, .5, .5, .5, nan, .5],
                 odometry_chi2=[nan, nan, nan, 25.0, 100.0, 2.0, 2.0, 2.0, 2.0, nan, 2.0],
                 map_chi2=[nan, nan, nan, nan, 4.0, nan, nan, nan, 36.0, nan, nan],
                 map_std_m=[nan, nan, nan, nan, 0.5, nan, nan, nan, 0.05, nan, nan],
                 gnc_weight=[nan, nan, nan, nan, nan, 0.9, 0.2, nan, nan, nan, nan],
                 graph_chi2=[nan, nan, nan, nan, nan, 36.0, nan, nan, nan, nan, nan])
    m = decision_margins(reason, f, BOUNDS)
    want = [(0.15 - 0.3) / 0.3, (0.08 - 0.1) / 0.08, (0.95 - 0.99) / 0.95,
            (4 - 5) / 4,                                   # odometry gate in distance units: sqrt(16) vs sqrt(25)
            min((4 - 2) / 4, (0.25 - 0.5) / 0.25),         # the map gate retried it: the map was too loose
            (3 - 6) / 3,                                   # residual test, sqrt(9) vs sqrt(36)
            (0.2 - 0.5) / 0.5,                             # dropped by GNC before the residual test
            nan,                                           # PCM alone: a set decision, no margin
            min((4 - 6) / 4, (0.25 - 0.05) / 0.25),        # PCM, then the map gate's distance failed
            nan, nan]
    np.testing.assert_allclose(m.value, want, rtol=1e-12)
    assert m.check.tolist() == ["overlap", "rmse", "ambiguity", "odometry_gate", "map_gate", "graph_residual",
                                "gnc_weight", "", "map_gate", "", ""]


def test_a_set_aside_clique_member_is_measured_against_the_map_gate_when_retried():
    # unsupported_group, like pair_inconsistent: a set decision (no margin) unless the map gate retried it.
    reason = np.array(["unsupported_group", "unsupported_group"])
    f = _figures(odometry_chi2=[30.0, 30.0], map_chi2=[math.nan, 64.0], map_std_m=[math.nan, 0.1])
    m = decision_margins(reason, f, BOUNDS)
    np.testing.assert_allclose(m.value, [math.nan, min((4 - 8) / 4, (0.25 - 0.1) / 0.25)], rtol=1e-12)
    assert m.check.tolist() == ["", "map_gate"]


def test_an_accepted_closure_takes_its_tightest_passed_check():
    reason = np.array(["accepted", "accepted", "accepted"])
    f = _figures(overlap=[0.33, 0.9, 0.9], rmse_m=[0.01, 0.01, 0.01], ambiguity=[0.5, 0.5, np.nan],
                 odometry_chi2=[1.0, 15.0, 400.0], odometry_informative=[True, True, True],
                 map_chi2=[np.nan, np.nan, 1.0], map_std_m=[np.nan, np.nan, 0.2],
                 gnc_weight=[1.0, 1.0, 1.0], graph_chi2=[1.0, 1.0, 1.0])
    m = decision_margins(reason, f, BOUNDS)
    # 1: overlap 0.33 over 0.3; 2: the odometry gate, sqrt(15) just under 4; 3: failed the odometry gate, joined
    # through the map gate, whose map tightness (0.2 of 0.25) is its closest call.
    np.testing.assert_allclose(m.value, [0.1, (4 - 15 ** 0.5) / 4, (0.25 - 0.2) / 0.25], rtol=1e-12)
    assert m.check.tolist() == ["overlap", "odometry_gate", "map_gate"]


def test_the_odometry_gate_counts_only_where_it_is_informative():
    f = _figures(odometry_chi2=[100.0], odometry_informative=[False], overlap=[0.6])
    m = decision_margins(np.array(["accepted"]), f, BOUNDS)
    assert m.check.tolist() == ["overlap"] and m.value[0] == pytest.approx(1.0)


def test_bounds_follow_the_options():
    b = check_bounds(VerifyOptions(min_overlap=0.4, gnc_min_weight=0.25, map_max_std_m=0.1))
    assert (b["overlap"], b["gnc_weight"], b["map_std_m"]) == (0.4, 0.25, 0.1)


def test_margin_signs_agree_with_the_verdicts_of_a_real_run(e2e_run):
    _, _, out = e2e_run
    with open(out / "candidates.csv", newline="") as fh:
        rows = list(csv.DictReader(fh))
    names = ("overlap", "rmse_m", "ambiguity", "odometry_chi2", "map_chi2", "map_std_m", "gnc_weight", "graph_chi2")
    figures = {k: np.array([float(r[k]) if r[k] else np.nan for r in rows]) for k in names}
    figures["odometry_informative"] = np.array([r["odometry_informative"] == "true" for r in rows])
    m = decision_margins(np.array([r["reason"] for r in rows]), figures, check_bounds(VerifyOptions()))
    accepted = np.array([r["verdict"] == "accepted" for r in rows])
    has = np.isfinite(m.value)
    assert has[accepted].all(), "every verified closure passed checks with bounds"
    assert (m.value[accepted] >= 0).all()
    assert (m.value[~accepted & has] < 0).all()
    assert (~accepted & has).sum() > 10, "the run must reject some candidates on a bound for this test to mean much"
