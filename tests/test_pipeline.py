"""End to end: a small generated log through `closurecheck run`, then `closurecheck score`.

The figures asserted are the project's acceptance bars for the whole job
(zero false closures, revisit-event recall >= 0.9, trajectory error <= 0.10 m
after rigid alignment); the log is simulated with a seed other than the
demo's. The contract checks (graph.json, candidates.csv) follow
docs/formats.md.
"""

import csv
import json

import numpy as np
import pytest

from closurecheck import cli
from closurecheck.config import RunConfig, build_config
from closurecheck.io.graph_file import read_graph


@pytest.fixture(scope="module")
def run(e2e_run):
    base, log_path, out = e2e_run
    score_json = base / "score.json"
    assert cli.main(["score", str(out), "--json", str(score_json), "-q"]) == 0
    return {"log": log_path, "out": out, "score": json.loads(score_json.read_text())}


def test_acceptance_figures(run):
    s = run["score"]
    assert s["false_closures"] == 0
    assert s["accepted"] > 0
    assert s["revisit_events"] >= 3, "the generated log must contain revisits for this test to mean anything"
    assert s["revisit_event_recall"] >= 0.9
    assert s["ate_optimised_m"] <= 0.10
    assert s["ate_optimised_m"] < s["ate_odometry_m"]


def test_graph_follows_the_contract(run):
    doc = json.loads((run["out"] / "graph.json").read_text())
    assert doc["graph"] == 1 and doc["source"] == "ring.jsonl.gz"
    ids = [n["id"] for n in doc["nodes"]]
    assert ids == sorted(ids) and ids[0] == 0
    for n in doc["nodes"]:
        assert len(n["pose"]) == 3 and len(n["odom"]) == 3 and -np.pi < n["pose"][2] <= np.pi
    kinds = {e["kind"] for e in doc["edges"]}
    assert kinds == {"odometry", "loop"}
    for e in doc["edges"]:
        info = np.array(e["information"])
        assert info.shape == (3, 3)
        np.testing.assert_allclose(info, info.T, atol=1e-9 * np.abs(info).max())
        assert np.all(np.linalg.eigvalsh(info) > 0)
        if e["kind"] == "loop":
            np.testing.assert_allclose(np.array(e["covariance"]) @ info, np.eye(3), atol=1e-6)
            assert isinstance(e["checks"], dict) and "overlap" in e["checks"]
    graph = read_graph(run["out"] / "graph.json")
    assert len(graph.ids) == len(ids)


def test_candidates_csv_lists_every_verdict(run):
    with open(run["out"] / "candidates.csv", newline="") as fh:
        rows = list(csv.DictReader(fh))
    assert rows
    for col in ("from", "to", "verdict", "reason", "dx", "dy", "dtheta"):
        assert col in rows[0]
    assert {r["verdict"] for r in rows} <= {"accepted", "rejected"}
    accepted = [r for r in rows if r["verdict"] == "accepted"]
    assert all(r["reason"] == "accepted" for r in accepted)
    assert all(r["reason"] != "accepted" for r in rows if r["verdict"] == "rejected")
    doc = json.loads((run["out"] / "graph.json").read_text())
    loops = {(e["from"], e["to"]) for e in doc["edges"] if e["kind"] == "loop"}
    assert loops == {(int(r["from"]), int(r["to"])) for r in accepted}


def test_effective_config_is_recorded_and_loads(run):
    cfg = build_config(run["out"] / "config.toml")
    assert cfg == RunConfig()


def test_report_is_self_contained(run):
    text = (run["out"] / "report.html").read_text()
    assert "data:image/png;base64," in text
    assert "http://" not in text and "https://" not in text
    assert "Caution" in text and 'id="candidates"' in text
    for name in ("map", "loops", "checks", "truth"):
        assert (run["out"] / "figures" / f"{name}.png").stat().st_size > 1000


def test_score_of_an_external_candidate_list(run, tmp_path, capsys):
    # Our own candidates.csv is a valid input pairs file (extra columns ignored).
    assert cli.main(["score", str(run["out"]), "--candidates", str(run["out"] / "candidates.csv")]) == 0
    out = capsys.readouterr().out
    assert "Scored against: the ground truth" in out
    assert "precision (right / registered)" in out and "revisit-event recall" in out


def test_odometry_noise_options_raise_the_calibrated_steps(run, tmp_path):
    # A user's noise model given as options wins where the calibration fitted
    # less: each keyframe step's variances are at least the model's (the
    # chain must stay positive definite, so only the diagonal is raised).
    import numpy as np

    from closurecheck.config import OdometryOverrides, RunConfig
    from closurecheck.core.odometry import odometry_travel
    from closurecheck.io.scanlog import read_scanlog
    from closurecheck.pipeline import run_log

    log_path = run["log"]
    out = tmp_path / "noisy"
    assert cli.main(["run", str(log_path), "--out", str(out), "-q", "--odom-translation-noise", "0.05"]) in (0, 3)
    assert (out / "graph.json").exists()
    log = read_scanlog(log_path)
    cfg = RunConfig(jobs=1, odometry=OdometryOverrides(translation_m_per_sqrt_m=0.05))
    got = run_log(log, cfg)
    kf = got.keyframes
    travel, _ = odometry_travel(log.odom)
    want = 0.05 ** 2 * np.diff(travel[kf])
    steps = got.calibration.chain.steps
    assert np.all(steps[:, 0, 0] >= want - 1e-15) and np.all(steps[:, 1, 1] >= want - 1e-15)
    assert np.all(np.linalg.eigvalsh(steps) > 0)


def test_descriptors_made_beside_the_calibration_are_describes_own(tmp_path):
    # pipeline._AlongCalibration makes the keyframes' descriptors in a thread while the workers
    # calibrate; they must be describe's arrays for the same scans, and an error in the thread must
    # reach the caller rather than vanish with it.
    from closurecheck import pipeline
    from closurecheck.frontend.descriptors import describe
    from closurecheck.io.inputs import DEMO_LOG

    log, _ = pipeline.open_log(DEMO_LOG)
    keyframes = np.arange(0, len(log), 7)
    config = RunConfig()
    got = pipeline._AlongCalibration(log, keyframes, config).descriptors()
    ref = describe(log.ranges[keyframes], log.sensor, config.descriptors)
    assert np.array_equal(got.vectors, ref.vectors)
    assert np.array_equal(got.sectors, ref.sectors, equal_nan=True)
    with pytest.raises(IndexError):
        pipeline._AlongCalibration(log, np.array([len(log) + 5]), config).descriptors()


def test_the_run_holds_blas_to_one_thread_and_gives_it_back(monkeypatch):
    # A second BLAS thread waits for a core the run's other process holds (docs/architecture.md);
    # run_log limits BLAS to one thread while it runs, and the caller's setting comes back after.
    from threadpoolctl import threadpool_info, threadpool_limits

    from closurecheck import pipeline
    from closurecheck.io.inputs import DEMO_LOG

    seen = []

    class Stop(Exception):
        pass

    def spy(*args, **kwargs):
        seen.extend(i["num_threads"] for i in threadpool_info() if i["user_api"] == "blas")
        raise Stop

    monkeypatch.setattr(pipeline, "select_keyframes", spy)
    log, _ = pipeline.open_log(DEMO_LOG)

    def blas_threads():
        return [i["num_threads"] for i in threadpool_info() if i["user_api"] == "blas"]

    with threadpool_limits(limits=2, user_api="blas"):
        # (A single-threaded build, such as cvxopt's OpenBLAS once loaded, stays at 1.)
        before = blas_threads()
        with pytest.raises(Stop):
            pipeline.run_log(log, RunConfig(jobs=1))
        after = blas_threads()
    assert 2 in before
    assert seen and set(seen) == {1}
    assert after == before
