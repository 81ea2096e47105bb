"""The tool survives bad input and bad luck: clear one-line errors, exit codes,
and no half-written or lost outputs."""

import errno
import json

import pytest

from closurecheck import cli, pipeline
from closurecheck.io import atomic
from closurecheck.io.scanlog import write_scanlog
from closurecheck.simulation.simulate import simulate_log


@pytest.fixture(scope="module")
def small_run(tmp_path_factory):
    base = tmp_path_factory.mktemp("rel")
    log = base / "small.jsonl.gz"
    write_scanlog(log, simulate_log("ring", seed=4, scans=300))
    out = base / "out"
    assert cli.main(["run", str(log), "--out", str(out), "-q", "--no-report", "--jobs", "1"]) == 0
    snapshot = {p.name: p.read_bytes() for p in out.iterdir() if p.is_file()}
    return {"log": log, "out": out, "snapshot": snapshot}


def outputs_unchanged(run):
    now = {p.name: p.read_bytes() for p in run["out"].iterdir() if p.is_file()}
    return now == run["snapshot"]


def one_line_error(capsys, *words):
    err = capsys.readouterr().err.strip()
    assert "Traceback" not in err, err
    assert err.count("\n") == 0, err
    for w in words:
        assert w in err, err
    return err


def test_output_path_that_is_a_file(small_run, tmp_path, capsys):
    target = tmp_path / "taken"
    target.write_text("not a directory")
    assert cli.main(["run", str(small_run["log"]), "--out", str(target), "-q"]) == 2
    one_line_error(capsys, "not a directory")
    assert target.read_text() == "not a directory"


def test_disk_full_keeps_previous_outputs(small_run, monkeypatch, capsys):
    def full(fd):
        raise OSError(errno.ENOSPC, "No space left on device")

    monkeypatch.setattr(atomic.os, "fsync", full)
    assert cli.main(["run", str(small_run["log"]), "--out", str(small_run["out"]), "-q", "--no-report",
                     "--jobs", "1"]) == 2
    one_line_error(capsys, "No space left on device")
    assert outputs_unchanged(small_run)
    assert not [p for p in small_run["out"].iterdir() if p.name.endswith(".part")]


def test_interrupt_mid_run_keeps_previous_outputs(small_run, monkeypatch, capsys):
    def interrupted(*args, **kwargs):
        raise KeyboardInterrupt

    monkeypatch.setattr(pipeline, "verify", interrupted)
    assert cli.main(["run", str(small_run["log"]), "--out", str(small_run["out"]), "-q", "--jobs", "1"]) == 2
    one_line_error(capsys, "interrupted")
    assert outputs_unchanged(small_run)


def test_internal_error_exits_one_and_traceback_only_when_verbose(small_run, tmp_path, monkeypatch, capsys):
    def broken(*args, **kwargs):
        raise RuntimeError("simulated bug")

    monkeypatch.setattr(pipeline, "verify", broken)
    args = ["run", str(small_run["log"]), "--out", str(tmp_path / "o"), "-q", "--jobs", "1"]
    assert cli.main(args) == 1
    one_line_error(capsys, "internal error", "simulated bug")
    assert cli.main(args + ["--verbose"]) == 1
    assert "Traceback" in capsys.readouterr().err


def test_unknown_scan_id_in_pairs_file(small_run, tmp_path, capsys):
    pairs = tmp_path / "pairs.csv"
    pairs.write_text("from,to\n10,2\n5,99999\n")
    assert cli.main(["run", str(small_run["log"]), "--out", str(tmp_path / "o"), "--candidates", str(pairs),
                     "-q"]) == 2
    one_line_error(capsys, "pairs.csv:3", "99999")


@pytest.mark.parametrize("args,words", [
    (["run", "--out", "x"], "LOG"),
    (["run", "missing.jsonl", "--out", "o"], "no such file"),
    (["run", "LOG", "--out", "o", "--jobs", "-1"], "jobs"),
    (["run", "LOG", "--out", "o", "--also-propose"], "--also-propose"),
    (["run", "LOG", "--out", "o", "--gate-probability", "1.5"], "probability"),
    (["nonsense"], "invalid choice"),
])
def test_bad_usage_is_exit_two(small_run, tmp_path, capsys, args, words, monkeypatch):
    monkeypatch.chdir(tmp_path)
    args = [str(small_run["log"]) if a == "LOG" else a for a in args] + ["-q"]
    assert cli.main(args) == 2
    one_line_error(capsys, words)


def test_bad_config_file(small_run, tmp_path, capsys):
    cfg = tmp_path / "c.toml"
    cfg.write_text("[verify]\nmin_overlap = 'lots'\n")
    assert cli.main(["run", str(small_run["log"]), "--out", str(tmp_path / "o"), "--config", str(cfg), "-q"]) == 2
    one_line_error(capsys, "c.toml", "verify.min_overlap")


def test_rerun_from_recorded_config_reproduces_the_graph(small_run, tmp_path):
    out2 = tmp_path / "again"
    assert cli.main(["run", str(small_run["log"]), "--out", str(out2), "-q", "--no-report", "--jobs", "1",
                     "--config", str(small_run["out"] / "config.toml")]) == 0
    assert (out2 / "graph.json").read_bytes() == small_run["snapshot"]["graph.json"]
    summary = json.loads((out2 / "summary.json").read_text())
    assert summary["log_path"].endswith("small.jsonl.gz")
