"""The tool survives bad input and bad luck: clear one-line errors, exit codes,
and no half-written or lost outputs."""

import errno
import json

import numpy as np
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


# --- strict JSON (no bare NaN) -----------------------------------------------------------------------

def _strict(text: str):
    """Parse as strict JSON (RFC 8259 has no NaN or Infinity): such a token raises."""
    def refuse(token):
        raise ValueError(f"not JSON: {token}")
    return json.loads(text, parse_constant=refuse)


def test_summary_and_score_json_hold_null_not_nan(small_run, tmp_path, capsys):
    # The small run verifies no closure, so precision and NEES are undefined.
    summary = _strict((small_run["out"] / "summary.json").read_text())
    assert summary["score"]["accepted"] == 0
    assert summary["score"]["closure_precision"] is None
    scores = tmp_path / "scores.json"
    assert cli.main(["score", str(small_run["out"]), "--json", str(scores), "-q"]) == 0
    doc = _strict(scores.read_text())
    assert doc["closure_precision"] is None and doc["nees_mean"] is None


def test_one_json_writer_refuses_what_it_cannot_make_strict():
    from closurecheck.io.json_file import json_text

    text = json_text({"a": float("nan"), "b": [float("inf"), -float("inf"), 1.5], "c": {"d": float("nan")}})
    assert _strict(text) == {"a": None, "b": [None, None, 1.5], "c": {"d": None}}


# --- cap on pairs, expected time --------------------------------------------------------------------

def test_pairs_above_max_pairs_are_refused_before_registration(small_run, tmp_path, capsys):
    pairs = tmp_path / "pairs.csv"
    pairs.write_text("from,to\n" + "".join(f"{a},{a + 5}\n" for a in range(0, 120)))
    out = tmp_path / "o"
    assert cli.main(["run", str(small_run["log"]), "--out", str(out), "--candidates", str(pairs),
                     "--max-pairs", "100", "-q", "--jobs", "1"]) == 2
    err = one_line_error(capsys, "pairs.csv:102", "more than 100 pairs", "--max-pairs")
    assert "Traceback" not in err
    assert not out.exists()


def test_default_pair_cap_is_finite_and_documented():
    from pathlib import Path

    from closurecheck.config import RunConfig

    cap = RunConfig().max_pairs
    assert 10_000 <= cap < 10 ** 7
    doc = (Path(__file__).resolve().parents[1] / "docs" / "cli.md").read_text()
    assert "--max-pairs" in doc and f"{cap:,}" in doc


def test_expected_time_after_the_first_batch_and_plain_lines_off_a_terminal(monkeypatch):
    import io

    from closurecheck.reporting import terminal

    clock = [100.0]
    monkeypatch.setattr(terminal.time, "perf_counter", lambda: clock[0])
    stream = io.StringIO()
    progress = terminal.Progress(stream=stream)
    progress.stage("registration")
    progress.begin("registration", 1_000_000, parallel=2)
    clock[0] += 3.0  # the first batch of 64 pairs took 3 s while the other worker ran its own
    progress.advance("registration", 64, 1_000_000)
    for _ in range(400):  # then two workers hand back a batch every 1.5 s, for 600 s
        clock[0] += 1.5
        progress.advance("registration", 64, 1_000_000)
    text = stream.getvalue()
    assert "\r" not in text and "\x1b" not in text  # no bar redrawn in place
    lines = text.splitlines()
    first = next(ln for ln in lines if "first batch" in ln)
    # 1,000,000 pairs at 2 x 64 pairs per 3 s: 23,436 s, about 6.5 hours.
    assert "1000000 pairs" in first and "6 h 31 min" in first
    plain = [ln for ln in lines if "pairs (" in ln]
    assert 50 <= len(plain) <= 62  # a line per 10 s or so of the 603 s, not one per batch
    assert "about 6 h" in plain[-1]  # the pace held: still about 6 hours to go
    assert all(len(ln) < 120 for ln in lines)


# --- feedback to a new user ---------------------------------------------------------------------------

def test_writing_outputs_shows_its_steps(tmp_path, capsys):
    log = tmp_path / "short.jsonl.gz"
    write_scanlog(log, simulate_log("ring", seed=3, scans=40))
    out = tmp_path / "o"
    assert cli.main(["run", str(log), "--out", str(out), "--jobs", "1"]) == 0
    err = capsys.readouterr().err
    for step in ("writing outputs", "candidates.csv", "report: maps", "report: loop closures",
                 "report: check figures", "putting the outputs in place"):
        assert step in err, err


def test_a_log_without_revisits_says_so(tmp_path, capsys):
    log = tmp_path / "short.jsonl.gz"
    write_scanlog(log, simulate_log("ring", seed=3, scans=40))
    out = tmp_path / "o"
    assert cli.main(["run", str(log), "--out", str(out), "--jobs", "1", "--no-report"]) == 0
    captured = capsys.readouterr()
    assert "no loop-closure candidates" in captured.out and "no revisits" in captured.out
    assert "no loop-closure candidates" in captured.err  # said while running, too
    assert any("no revisits" in n for n in json.loads((out / "summary.json").read_text())["notes"])


def test_an_empty_pairs_file_says_so(small_run, tmp_path, capsys):
    pairs = tmp_path / "none.csv"
    pairs.write_text("from,to\n")
    out = tmp_path / "o"
    assert cli.main(["run", str(small_run["log"]), "--out", str(out), "--candidates", str(pairs),
                     "--jobs", "1", "--no-report"]) == 0
    assert "the pairs file holds no pairs" in capsys.readouterr().out


def test_bare_command_prints_usage_and_one_error_line(capsys):
    assert cli.main([]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 2 and err[0].startswith("usage: closurecheck")
    assert err[1].startswith("closurecheck: error: choose a command") and err[1].count("closurecheck:") == 1


def test_usage_errors_have_one_prefix(capsys):
    assert cli.main(["run", "-q"]) == 2
    err = one_line_error(capsys, "run: the following arguments are required")
    assert err.count("closurecheck") == 1


@pytest.mark.parametrize("args", [["run", "LOG", "--out", ""], ["run", "LOG", "--out", " "],
                                  ["simulate", "--out", ""], ["score", "x", "--json", ""]])
def test_empty_paths_are_refused(small_run, tmp_path, monkeypatch, capsys, args):
    monkeypatch.chdir(tmp_path)
    args = [str(small_run["log"]) if a == "LOG" else a for a in args]
    assert cli.main(args + ["-q"]) == 2
    one_line_error(capsys, "empty")
    assert list(tmp_path.iterdir()) == []


def test_demo_prints_the_report_path_once(tmp_path, monkeypatch, capsys):
    from closurecheck.io import inputs

    log = tmp_path / "mini_demo.jsonl.gz"
    write_scanlog(log, simulate_log("ring", seed=3, scans=40))
    monkeypatch.setattr(inputs, "DEMO_LOG", log)
    assert cli.main(["demo", "--out", str(tmp_path / "d"), "--jobs", "1"]) == 0
    out = capsys.readouterr().out
    assert out.count("report.html") == 1


def test_readme_install_command_is_one_line_and_not_silent():
    from pathlib import Path

    readme = (Path(__file__).resolve().parents[1] / "README.md").read_text()
    line = next(ln for ln in readme.splitlines() if "pip install" in ln and "-e ." in ln and "venv" in ln)
    assert " -q" not in line and "&&" in line and "closurecheck demo" in line


def test_broken_stdout_pipe_is_quiet(small_run):
    import os
    import subprocess
    import sys
    from pathlib import Path

    root = Path(__file__).resolve().parents[1]
    read_end, write_end = os.pipe()
    os.close(read_end)  # the reader is gone before anything is written, as after `| head -1`
    try:
        res = subprocess.run([sys.executable, "-m", "closurecheck", "info", str(small_run["log"])],
                             stdout=write_end, stderr=subprocess.PIPE, text=True, cwd=small_run["log"].parent,
                             env=dict(os.environ, PYTHONPATH=str(root)), timeout=120)
    finally:
        os.close(write_end)
    assert res.returncode == cli.EXIT_BROKEN_PIPE == 141
    assert res.stderr == ""


def _python(code: str, **kwargs):
    import os
    import subprocess
    import sys
    from pathlib import Path

    root = Path(__file__).resolve().parents[1]
    # Without PYTHONUNBUFFERED (set in some shells and CI images), so that stdout is buffered until
    # the exit, as a user's command's is.
    env = {k: v for k, v in os.environ.items() if k != "PYTHONUNBUFFERED"}
    return subprocess.run([sys.executable, "-c", code], env=dict(env, PYTHONPATH=str(root)), timeout=120,
                          **kwargs)


def test_finish_keeps_status_output_and_other_exit_handlers(tmp_path):
    # cli.finish skips only the interpreter's teardown: handlers registered after the command's
    # module still run, the status gets through, and buffered output (more than a pipe holds)
    # reaches the reader in full.
    mark = tmp_path / "handler_ran"
    code = ("import atexit, pathlib, sys\n"
            "from closurecheck.cli import finish\n"
            f"atexit.register(pathlib.Path({str(mark)!r}).write_text, 'yes')\n"
            "sys.stdout.write('x' * 300000)\n"
            "finish(3)\n")
    res = _python(code, capture_output=True, text=True)
    assert res.returncode == 3, res.stderr
    assert res.stdout == "x" * 300000
    assert mark.read_text() == "yes"


def test_finish_reports_a_failed_flush_as_python_does():
    # Python's own exit turns a failed flush of stdout into status 120 (CPython's Py_Main; the
    # reference here is the interpreter itself, run the same way without finish).
    import os
    import subprocess

    statuses = []
    for tail in ("", "from closurecheck.cli import finish; finish(0)"):
        read_end, write_end = os.pipe()
        os.close(read_end)
        try:
            res = _python(f"import sys; sys.stdout.write('x' * 100); {tail}", stdout=write_end,
                          stderr=subprocess.DEVNULL)
        finally:
            os.close(write_end)
        statuses.append(res.returncode)
    assert statuses == [120, 120]


# --- what run reads, info reads -----------------------------------------------------------------------

def test_info_refuses_a_malformed_odometry_noise_header_like_run(tmp_path, capsys):
    log = simulate_log("ring", seed=3, scans=30)
    bad = tmp_path / "noisy.jsonl"
    write_scanlog(bad, log)
    lines = bad.read_text().splitlines()
    header = json.loads(lines[0])
    header["odometry_noise"] = {"translation_m_per_sqrt_m": "a lot"}
    bad.write_text("\n".join([json.dumps(header)] + lines[1:]) + "\n")
    assert cli.main(["info", str(bad)]) == 2
    info_err = one_line_error(capsys, "noisy.jsonl:1", "odometry_noise")
    assert cli.main(["run", str(bad), "--out", str(tmp_path / "o"), "-q", "--jobs", "1"]) == 2
    assert one_line_error(capsys) == info_err


# --- non-regular files, long values -----------------------------------------------------------------

@pytest.mark.parametrize("command", ["info", "run"])
def test_a_named_pipe_is_refused_without_waiting(tmp_path, command):
    import os
    import subprocess
    import sys
    from pathlib import Path

    fifo = tmp_path / "stream.jsonl"
    os.mkfifo(fifo)
    root = Path(__file__).resolve().parents[1]
    args = [sys.executable, "-m", "closurecheck", command, str(fifo)]
    if command == "run":
        args += ["--out", str(tmp_path / "o"), "-q"]
    # Opening a FIFO with no writer blocks forever: the old reader hung here.
    res = subprocess.run(args, capture_output=True, text=True, cwd=tmp_path,
                         env=dict(os.environ, PYTHONPATH=str(root)), timeout=60)
    assert res.returncode == 2
    err = res.stderr.strip()
    assert err.count("\n") == 0 and "named pipe" in err and "stream.jsonl" in err


@pytest.mark.parametrize("which", ["pairs", "config"])
def test_a_named_pipe_as_pairs_or_config_file_is_refused(small_run, tmp_path, capsys, which):
    import os

    fifo = tmp_path / "fifo"
    os.mkfifo(fifo)
    option = "--candidates" if which == "pairs" else "--config"
    assert cli.main(["run", str(small_run["log"]), "--out", str(tmp_path / "o"), option, str(fifo), "-q"]) == 2
    one_line_error(capsys, "named pipe")


def test_huge_bad_values_are_cut_in_the_error_line(small_run, tmp_path, capsys):
    pairs = tmp_path / "huge.csv"
    pairs.write_text("from,to\n1," + "7x" * 50_000 + "\n")
    assert cli.main(["run", str(small_run["log"]), "--out", str(tmp_path / "o"), "--candidates", str(pairs),
                     "-q"]) == 2
    err = one_line_error(capsys, "huge.csv:2", "100002 characters")
    assert len(err) < 400
    # A 20 MB value in a settings file: the message is cut whatever check reports it.
    cfg = tmp_path / "huge.toml"
    cfg.write_text("[verify]\nmin_overlap = '" + "x" * 20_000_000 + "'\n")
    assert cli.main(["run", str(small_run["log"]), "--out", str(tmp_path / "o"), "--config", str(cfg), "-q"]) == 2
    err = one_line_error(capsys, "huge.toml", "min_overlap")
    assert len(err) < 1000


# --- Ctrl-C at several points (subprocesses, Ctrl-C to the whole process group as a terminal does) ----

@pytest.fixture(scope="module")
def interrupt_case(tmp_path_factory):
    base = tmp_path_factory.mktemp("sigint")
    log = base / "ring.jsonl.gz"
    write_scanlog(log, simulate_log("ring", seed=4, scans=300))
    template = base / "template"
    assert cli.main(["run", str(log), "--out", str(template), "-q", "--jobs", "1", "--no-report"]) == 0
    return log, template


def _interrupted_run(interrupt_case, tmp_path, marker, signals=1):
    import os
    import shutil
    import signal
    import subprocess
    import sys
    import time
    from pathlib import Path

    from procs import alive, descendants  # tests/procs.py

    log, template = interrupt_case
    out = tmp_path / "run"
    shutil.copytree(template, out)
    before = {p: p.read_bytes() for p in sorted(out.rglob("*")) if p.is_file()}
    root = Path(__file__).resolve().parents[1]
    proc = subprocess.Popen([sys.executable, "-m", "closurecheck", "run", str(log), "--out", str(out),
                             "--jobs", "2"], cwd=tmp_path, env=dict(os.environ, PYTHONPATH=str(root)),
                            stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, text=True, start_new_session=True)
    seen, children = [], []
    try:
        for line in proc.stderr:
            seen.append(line)
            if marker in line:
                break
        assert marker in "".join(seen), "".join(seen)
        children = descendants(proc.pid)
        for k in range(signals):
            os.killpg(proc.pid, signal.SIGINT)
            time.sleep(0.05)
        t0 = time.monotonic()
        rest = proc.stderr.read()
        proc.wait(timeout=30)
        took = time.monotonic() - t0
        deadline = time.monotonic() + 10
        while time.monotonic() < deadline and any(alive(c) for c in children):
            time.sleep(0.1)
        survivors = [c for c in children if alive(c)]
    finally:
        if proc.poll() is None:
            proc.kill()
        for c in children:
            if alive(c):
                os.kill(c, signal.SIGKILL)
    after = {p: p.read_bytes() for p in sorted(out.rglob("*")) if p.is_file()}
    leftovers = [p.name for p in tmp_path.iterdir() if p.name.startswith(".run.closurecheck-")]
    return proc.returncode, rest, took, survivors, after == before, leftovers


@pytest.mark.slow
@pytest.mark.parametrize("marker", ["at the first batch's pace", "report: maps", "report: check figures"])
def test_ctrl_c_stops_cleanly_at_any_point(interrupt_case, tmp_path, marker):
    code, err, took, survivors, unchanged, leftovers = _interrupted_run(interrupt_case, tmp_path, marker)
    assert code == 2, err
    lines = [ln for ln in err.splitlines() if ln.startswith("closurecheck:")]
    assert len(lines) == 1 and "interrupted" in lines[0], err
    for bad in ("Traceback", "Fatal Python error", "Exception ignored", "KeyboardInterrupt"):
        assert bad not in err, err
    assert took < 20, took  # seconds from Ctrl-C to exit; about 1 s on an idle machine
    assert survivors == []
    assert unchanged and leftovers == []


@pytest.mark.slow
def test_a_second_ctrl_c_exits_at_once_with_a_message(interrupt_case, tmp_path):
    code, err, took, survivors, unchanged, _ = _interrupted_run(interrupt_case, tmp_path,
                                                                "at the first batch's pace", signals=2)
    assert code == 2, err
    assert "interrupted" in err and "Traceback" not in err and "Fatal Python error" not in err
    assert took < 20
    assert survivors == []
    assert unchanged


def test_more_candidates_than_the_exact_pairwise_test_takes_are_refused_before_registration():
    # The exact PCM test is quadratic in memory on drifted logs (docs/verification.md); a run that would
    # exceed verify.max_exact_closures is refused with one line before any candidate is registered.
    import dataclasses
    from pathlib import Path

    from closurecheck import simulate_log
    from closurecheck.config import RunConfig
    from closurecheck.errors import InputError
    from closurecheck.pipeline import run_log
    from closurecheck.runners.serial import SerialRunner

    log = simulate_log("ring", seed=1, scans=400)
    base = RunConfig(jobs=1)
    tight = dataclasses.replace(base, verify=dataclasses.replace(base.verify, max_exact_closures=3))
    registered = []

    class Counting(SerialRunner):
        def register(self, points, src, dst, *args, **kwargs):
            registered.append((np.asarray(src), np.asarray(dst)))
            return super().register(points, src, dst, *args, **kwargs)

    with pytest.raises(InputError) as err:
        run_log(log, tight, runner=Counting())
    text = str(err.value)
    assert "verify.max_exact_closures = 3" in text and "verify.pair_window_m" in text and "\n" not in text
    # only the calibration's keyframe steps were registered (each keyframe to the next), no candidate
    assert len(registered) == 1
    src, dst = registered[0]
    assert np.array_equal(src[1:], dst[:-1])
    doc = (Path(__file__).resolve().parents[1] / "docs" / "verification.md").read_text()
    assert f"{RunConfig().verify.max_exact_closures:,}" in doc
