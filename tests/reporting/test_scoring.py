"""Scores (closurecheck.reporting.scoring): the front-end's precision-recall, NEES against chi-square(3), scoring
without truth against the run's verdicts, and definitions whose figures reconcile.

Outside references: scikit-learn's ``precision_recall_curve`` and
``average_precision_score`` for the curve and its average precision;
scipy.stats.chi2 for the NEES distribution.
"""

import csv
import dataclasses
import json

import numpy as np
import pytest
from scipy.stats import chi2
from sklearn.metrics import average_precision_score, precision_recall_curve

from closurecheck import cli
from closurecheck.io.scanlog import read_scanlog, write_scanlog
from closurecheck.reporting.scoring import (
    REFERENCE_TRUTH,
    REFERENCE_VERDICTS,
    frontend_figures,
    nees_figures,
    recall_at_full_precision,
)

# ---------------------------------------------------------------------------
# recall at precision 1: hand-made lists whose answer is known


@pytest.mark.parametrize("right, score, recall, threshold", [
    # Sorted by score: R R W R R -> the top two keep precision 1: 2 of 4 right pairs.
    ([1, 1, 0, 1, 1], [0.9, 0.8, 0.7, 0.6, 0.5], 0.5, 0.8),
    # Every right pair above every wrong one: all of them at precision 1, down to the lowest right score.
    ([0, 1, 0, 1, 1], [0.1, 0.7, 0.2, 0.9, 0.4], 1.0, 0.4),
    # The best-scored pair is wrong: no threshold gives precision 1.
    ([0, 1, 1], [0.9, 0.8, 0.7], 0.0, float("nan")),
    # A tie of a right and a wrong pair at the top: neither can be kept alone.
    ([1, 0, 1], [0.9, 0.9, 0.5], 0.0, float("nan")),
    # A tie of two right pairs above the wrong one counts both.
    ([1, 1, 0, 1], [0.9, 0.9, 0.8, 0.1], 2 / 3, 0.9),
])
def test_recall_at_precision_1_on_hand_made_lists(right, score, recall, threshold):
    p, r, t = precision_recall_curve(right, score)
    got_r, got_t = recall_at_full_precision(p, r, t)
    assert got_r == pytest.approx(recall)
    if np.isnan(threshold):
        assert np.isnan(got_t)
    else:
        assert got_t == threshold
    figures = frontend_figures(np.array(right, bool), np.array(score, float))
    assert figures["frontend_recall_at_precision_1"] == pytest.approx(recall)


def test_pairs_without_a_score_are_left_out_and_no_right_pair_gives_nan():
    f = frontend_figures(np.array([True, False, True]), np.array([0.9, np.nan, 0.1]))
    assert f["frontend_scored"] == 2 and f["frontend_recall_at_precision_1"] == 1.0
    assert f["frontend_threshold_at_precision_1"] == 0.1
    none = frontend_figures(np.array([False, False]), np.array([0.3, 0.2]))
    assert np.isnan(none["frontend_average_precision"]) and "frontend_pr_curve" not in none


# ---------------------------------------------------------------------------
# NEES against chi-square(3) (scipy.stats.chi2)


def test_nees_shares_of_honest_and_of_too_large_covariances():
    x = chi2(3).rvs(size=20000, random_state=np.random.default_rng(7))
    honest = nees_figures(x)
    # Binomial standard error at n = 20000 is at most 0.0035: 5 of them.
    assert honest["nees_share_in_central_50pct"] == pytest.approx(0.5, abs=0.018)
    assert honest["nees_share_in_central_95pct"] == pytest.approx(0.95, abs=0.008)
    assert honest["nees_median"] == pytest.approx(chi2(3).median(), rel=0.03)
    # Covariances twice too large halve the NEES: the mass piles up below the 95% interval, none above.
    big = nees_figures(x / 2.0)
    assert big["nees_share_below_central_95pct"] > 0.06
    assert big["nees_share_above_central_95pct"] < 0.005
    assert big["nees_share_in_central_50pct"] < 0.45
    assert big["nees_values"] == sorted(big["nees_values"]) and len(big["nees_values"]) == len(x)


# ---------------------------------------------------------------------------
# a front-end's scored pairs on a log without truth (the shared e2e log)


def _pairs_with_scores(candidates_csv, path, rng, per_verdict=40):
    """Up to ``per_verdict`` verified and as many rejected candidates of a run (few, to keep the test fast),
    with an invented confidence that favours the verified ones (ties included: two decimals)."""
    with open(candidates_csv, newline="") as fh:
        rows = list(csv.DictReader(fh))
    rows = [r for r in rows if r["verdict"] == "accepted"][:per_verdict] + \
        [r for r in rows if r["verdict"] == "rejected"][:per_verdict]
    with open(path, "w", newline="") as fh:
        w = csv.writer(fh)
        w.writerow(["from", "to", "score"])
        for r in rows:
            base = 0.7 if r["verdict"] == "accepted" else 0.35
            w.writerow([r["from"], r["to"], round(base + rng.normal(0, 0.15), 2)])
    return len(rows)


@pytest.fixture(scope="module")
def reference_run(e2e_run, tmp_path_factory):
    base, log_path, out = e2e_run
    work = tmp_path_factory.mktemp("reference")
    log = read_scanlog(log_path)
    no_truth = work / "no_truth.jsonl.gz"
    write_scanlog(no_truth, dataclasses.replace(log, truth=None))
    pairs = work / "pairs.csv"
    n = _pairs_with_scores(out / "candidates.csv", pairs, np.random.default_rng(3))
    run_dir = work / "run"
    assert cli.main(["run", str(no_truth), "--candidates", str(pairs), "--out", str(run_dir), "-q"]) == 0
    return {"run": run_dir, "pairs": pairs, "n": n, "work": work}


def test_score_without_truth_says_reference_and_uses_the_verdicts(reference_run, capsys):
    run_dir = reference_run["run"]
    score_json = reference_run["work"] / "score.json"
    assert cli.main(["score", str(run_dir), "--json", str(score_json)]) == 0
    printed = capsys.readouterr().out
    assert "REFERENCE, NOT THE TRUTH" in printed.splitlines()[0]
    s = json.loads(score_json.read_text())
    assert s["reference"] == REFERENCE_VERDICTS and "not the truth" in s["reference_note"]
    # Precision against the reference is the share of the front-end's pairs the run verified.
    with open(run_dir / "candidates.csv", newline="") as fh:
        rows = list(csv.DictReader(fh))
    verified = np.array([r["verdict"] == "accepted" for r in rows])
    assert s["proposals"] == len(rows) == reference_run["n"]
    assert s["proposals_right"] == verified.sum()
    assert s["proposal_precision"] == pytest.approx(verified.mean())
    assert "false_closures" not in s and "revisit_events" not in s
    # The report says the same.
    page = (run_dir / "report.html").read_text()
    assert "Scoring against this run&#x27;s verdicts (a reference, not the truth)" in page
    assert "Reference, not truth." in page


def test_precision_recall_and_average_precision_match_scikit_learn(reference_run):
    """The curve and its average precision are scikit-learn's ``precision_recall_curve`` and
    ``average_precision_score`` of the same verdicts (candidates.csv) and scores (the pairs file)."""
    s = json.loads((reference_run["run"] / "summary.json").read_text())["score"]
    with open(reference_run["run"] / "candidates.csv", newline="") as fh:
        rows = list(csv.DictReader(fh))
    with open(reference_run["pairs"], newline="") as fh:
        given = {(int(r["from"]), int(r["to"])): float(r["score"]) for r in csv.DictReader(fh)}
    y = np.array([r["verdict"] == "accepted" for r in rows])
    score = np.array([given[(int(r["from"]), int(r["to"]))] for r in rows])
    assert 0 < y.sum() < len(y), "the run must verify some of the pairs and reject others"
    # candidates.csv keeps the front-end's score.
    np.testing.assert_array_equal([float(r["score"]) for r in rows], score)
    precision, recall, thresholds = precision_recall_curve(y, score)
    curve = s["frontend_pr_curve"]
    np.testing.assert_allclose(curve["precision"], precision, rtol=1e-12)
    np.testing.assert_allclose(curve["recall"], recall, rtol=1e-12)
    np.testing.assert_allclose(curve["threshold"][:-1], thresholds, rtol=1e-12)
    assert s["frontend_average_precision"] == pytest.approx(average_precision_score(y, score), rel=1e-12)
    # The threshold keeps no rejected pair and as many verified ones as any threshold can.
    t = s["frontend_threshold_at_precision_1"]
    kept = score >= t
    assert y[kept].all()
    assert s["frontend_recall_at_precision_1"] == pytest.approx(kept.sum() / y.sum())
    assert t == score[y & (score > score[~y].max())].min()


def test_scoring_a_pairs_file_against_the_run(reference_run, capsys):
    assert cli.main(["score", str(reference_run["run"]), "--candidates", str(reference_run["pairs"])]) == 0
    printed = capsys.readouterr().out
    assert "REFERENCE" in printed and "average precision over the score" in printed


# ---------------------------------------------------------------------------
# with truth: one set of definitions whose figures add up (the shared e2e run)


def test_scores_with_truth_reconcile(e2e_run, tmp_path):
    _, _, out = e2e_run
    path = tmp_path / "s.json"
    assert cli.main(["score", str(out), "--json", str(path), "-q"]) == 0
    s = json.loads(path.read_text())
    assert s["reference"] == REFERENCE_TRUTH
    correct_verified = s["accepted"] - s["false_closures"]
    # Precision and recall share one notion of a right closure: the registered delta matches the truth.
    assert s["closure_precision"] == pytest.approx(correct_verified / s["accepted"])
    assert correct_verified <= s["candidates_registered_correctly"] <= s["candidates"]
    assert s["verifier_recall"] == pytest.approx(correct_verified / s["candidates_registered_correctly"])
    # Revisits are counted on the truth alone, among all keyframe pairs.
    assert s["accepted_at_revisit_pairs"] <= min(s["accepted"], s["candidates_at_revisit_pairs"])
    assert s["candidates_at_revisit_pairs"] <= s["revisit_pairs"]
    assert s["revisit_events_closed"] <= s["revisit_events"]
    # None of the retired, confusable keys.
    assert not {"true_pairs_among_candidates", "closure_recall", "true_pairs", "pair_precision"} & set(s)
    assert 0 < s["nees_share_in_central_95pct"] <= 1 and len(s["nees_values"]) == s["nees_closures"]


def test_scoring_a_folder_that_is_not_there_says_so(tmp_path, capsys):
    from closurecheck import cli

    assert cli.main(["score", str(tmp_path / "no_run_here")]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "no such run folder" in err[0]
    (tmp_path / "file.txt").write_text("x")
    assert cli.main(["score", str(tmp_path / "file.txt")]) == 2
    assert "not a run folder" in capsys.readouterr().err
