"""The trust verdict end to end: a run that cannot stand behind its map says so and exits 3."""

import json

from closurecheck import cli
from closurecheck.errors import EXIT_DOUBTFUL, EXIT_OK
from closurecheck.verification.trust import TrustOptions, judge


def test_a_run_whose_odometry_was_not_measured_is_doubtful(e2e_run, tmp_path, capsys):
    _, log, out = e2e_run
    sound = json.loads((out / "summary.json").read_text())
    assert sound["trust"] == {"verdict": "sound", "reasons": []}
    cfg = tmp_path / "off.toml"
    cfg.write_text("[calibration]\nenabled = false\n")
    target = tmp_path / "doubt"
    code = cli.main(["run", str(log), "--out", str(target), "--config", str(cfg)])
    captured = capsys.readouterr()
    assert code == EXIT_DOUBTFUL == 3
    info = json.loads((target / "summary.json").read_text())
    assert info["trust"]["verdict"] == "doubtful"
    assert "could not be measured" in info["trust"]["reasons"][0]
    assert "DOUBTFUL" in captured.out and "doubtful map" in captured.err
    # The outputs are complete all the same: a batch job decides what to do with them.
    assert (target / "graph.json").exists() and (target / "candidates.csv").exists()
    # The report opens with the verdict and its reasons, before anything else.
    page = (target / "report.html").read_text()
    banner = page.index('<section id="trust" class="doubtful"><h2>Map: DOUBTFUL</h2>')
    assert banner < page.index('id="caution"') < page.index('id="glance"')
    assert "could not be measured against its own scans" in page[banner:page.index('id="caution"')]
    sound_page = (out / "report.html").read_text()
    assert '<section id="trust" class="sound"><h2>Map: sound</h2>' in sound_page and "DOUBTFUL" not in sound_page
    assert 'id="agreement-section"' in sound_page


def test_each_reason_for_doubt_is_named():
    base = dict(calibrated=True, odometry_scale=1.0, drift_rate=0.0, drift_std=1e-4, drift_closures=40,
                clique_exact=True, contradictions=0, accepted=40)
    assert judge(**base).sound
    cases = {"calibrated": False, "odometry_scale": 9.0, "drift_rate": 1e-3, "clique_exact": False,
             "contradictions": 2}
    words = {"calibrated": "could not be measured", "odometry_scale": "noisier", "drift_rate": "heading drift",
             "clique_exact": "not proven", "contradictions": "contradict"}
    for key, value in cases.items():
        verdict = judge(**{**base, key: value})
        assert not verdict.sound and len(verdict.reasons) == 1 and words[key] in verdict.reasons[0], key
    # The bounds are settings.
    assert judge(**{**base, "odometry_scale": 9.0}, options=TrustOptions(max_odometry_scale=10.0)).sound
    assert EXIT_OK == 0
