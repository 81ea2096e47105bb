"""A run's output folder holds one complete set of outputs, or its previous one, never a mix.

Contract (docs/cli.md, "What an interrupted or failed run leaves"): the
outputs are written into a hidden staging folder beside --out and replace
--out as a whole; a failure or an interruption at any point leaves --out as
it was (or absent on a fresh path); a folder holding anything but a run's
outputs is not replaced.  Also: a batch's output folder names stay inside
--out and are unique (docs/cli.md, "run").
"""

from __future__ import annotations

import errno
import json
import os
import shutil
from pathlib import Path

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from closurecheck import cli, pipeline
from closurecheck.config import RunConfig
from closurecheck.io import atomic, pairs_csv
from closurecheck.io.inputs import output_name, output_names
from closurecheck.io.scanlog import write_scanlog
from closurecheck.reporting import outputs, report
from closurecheck.reporting.outputs import RUN_ENTRIES, write_outputs
from closurecheck.simulation.simulate import simulate_log


@pytest.fixture(scope="module")
def small(tmp_path_factory):
    """A short simulated log, the outcome of running it (serial registration), and a complete run folder.

    ``tiny`` is a log too short to revisit a place (no registration work),
    for runs through the command line that fail while writing.
    """
    base = tmp_path_factory.mktemp("folder")
    log = simulate_log("ring", seed=4, scans=150)
    path = base / "small.jsonl.gz"
    write_scanlog(path, log)
    tiny = base / "tiny.jsonl.gz"
    write_scanlog(tiny, simulate_log("ring", seed=4, scans=60))
    outcome = pipeline.run_log(log, RunConfig(jobs=1))
    template = base / "template"
    write_outputs(outcome, template, report=True, log_path=path)
    return {"base": base, "log": path, "tiny": tiny, "outcome": outcome, "template": template}


def snapshot(folder: Path) -> dict:
    """Every file under ``folder`` (relative name -> bytes)."""
    return {str(p.relative_to(folder)): p.read_bytes() for p in sorted(folder.rglob("*")) if p.is_file()}


def hidden_leftovers(folder: Path) -> list:
    return [p.name for p in folder.parent.iterdir() if p.name.startswith(f".{folder.name}.closurecheck-")]


@pytest.fixture()
def previous(small, tmp_path):
    """An output folder holding a complete previous run (with report)."""
    out = tmp_path / "run"
    shutil.copytree(small["template"], out)
    return out, snapshot(out)


def test_rerun_without_report_leaves_no_old_report(small, previous):
    out, before = previous
    assert "report.html" in before and any(k.startswith("figures") for k in before)
    write_outputs(small["outcome"], out, report=False, log_path=small["log"])
    names = sorted(p.name for p in out.iterdir())
    assert names == ["candidates.csv", "config.toml", "graph.json", "summary.json"]
    assert not hidden_leftovers(out)


def _fail_in_report(exc):
    def drawing(*args, **kwargs):
        raise exc
    return drawing


@pytest.mark.parametrize("exc", [OSError(errno.ENOSPC, "No space left on device"), KeyboardInterrupt()],
                         ids=["disk_full", "interrupt"])
def test_failure_while_building_the_report_keeps_the_previous_run_whole(small, previous, monkeypatch, exc):
    # The four core files are written before the report: a failure there
    # used to leave them new beside the old report.
    out, before = previous
    monkeypatch.setattr(report, "figure_histograms", _fail_in_report(exc))
    with pytest.raises(type(exc)):
        write_outputs(small["outcome"], out, report=True, log_path=small["log"])
    assert snapshot(out) == before
    assert not hidden_leftovers(out)


def test_interrupt_a_few_ms_into_writing_keeps_the_previous_run_whole(small, previous, monkeypatch):
    # candidates.csv is complete when graph.json's write is interrupted.
    out, before = previous

    def interrupted(path, graph):
        raise KeyboardInterrupt

    monkeypatch.setattr(outputs, "write_graph", interrupted)
    with pytest.raises(KeyboardInterrupt):
        write_outputs(small["outcome"], out, report=False, log_path=small["log"])
    assert snapshot(out) == before
    assert not hidden_leftovers(out)


def test_nothing_is_visible_before_the_run_is_complete(small, previous, monkeypatch):
    # While the report is drawn, --out still holds exactly the previous run.
    out, before = previous
    seen = []
    real = report.figure_maps

    def watching(data):
        seen.append(snapshot(out))
        return real(data)

    monkeypatch.setattr(report, "figure_maps", watching)
    write_outputs(small["outcome"], out, report=True, log_path=small["log"])
    assert seen == [before]
    assert (out / "report.html").is_file() and (out / "graph.json").is_file()


def test_failed_run_on_a_fresh_folder_leaves_nothing(small, tmp_path, monkeypatch):
    out = tmp_path / "fresh"

    def full(fd):
        raise OSError(errno.ENOSPC, "No space left on device")

    monkeypatch.setattr(atomic.os, "fsync", full)
    with pytest.raises(OSError) as info:
        write_outputs(small["outcome"], out, report=False, log_path=small["log"])
    assert not out.exists()
    assert not hidden_leftovers(out)
    # The error names a file of the run folder, not a temporary or staging name.
    assert Path(info.value.filename) == out / "candidates.csv"


def test_cli_disk_full_names_the_file_and_keeps_the_run(small, previous, monkeypatch, capsys):
    out, before = previous

    def full(fd):
        raise OSError(errno.ENOSPC, "No space left on device")

    monkeypatch.setattr(atomic.os, "fsync", full)
    assert cli.main(["run", str(small["tiny"]), "--out", str(out), "-q", "--jobs", "1"]) == 2
    err = capsys.readouterr().err.strip()
    assert err.count("\n") == 0 and "No space left on device" in err
    assert str(out / "candidates.csv") in err and ".part" not in err and "closurecheck-staging" not in err
    assert snapshot(out) == before


def test_write_errors_name_the_target_not_the_temporary_file(small, tmp_path, monkeypatch, capsys):
    real = os.replace

    def denied(src, dst):
        if str(src).endswith(".part"):
            raise PermissionError(errno.EACCES, "Permission denied", str(src))
        return real(src, dst)

    monkeypatch.setattr(atomic.os, "replace", denied)
    out = tmp_path / "o"
    assert cli.main(["run", str(small["tiny"]), "--out", str(out), "-q", "--jobs", "1", "--no-report"]) == 2
    err = capsys.readouterr().err.strip()
    assert "Permission denied" in err and str(out / "candidates.csv") in err, err
    assert ".part" not in err and "staging" not in err


def test_leftovers_of_a_killed_run_are_removed_by_the_next_run(small, previous):
    out, _ = previous
    dead = 2 ** 22 + 12345  # above the default pid_max of 4194304: no such process
    stale = out.parent / f".{out.name}{atomic.STAGING_MARK}staging-{dead}-0a1b2c3d"
    stale.mkdir()
    (stale / "graph.json").write_text("{}")
    write_outputs(small["outcome"], out, report=False, log_path=small["log"])
    assert not stale.exists()


def test_a_folder_with_other_files_is_not_replaced(small, tmp_path, capsys):
    out = tmp_path / "mine"
    out.mkdir()
    (out / "notes.txt").write_text("my own notes")
    assert cli.main(["run", str(small["log"]), "--out", str(out), "-q", "--jobs", "1", "--no-report"]) == 2
    err = capsys.readouterr().err
    assert "notes.txt" in err and err.count("\n") == 1
    assert sorted(p.name for p in out.iterdir()) == ["notes.txt"]


def test_the_current_folder_is_not_an_output_folder(small, tmp_path, monkeypatch, capsys):
    monkeypatch.chdir(tmp_path)
    for out in (".", str(tmp_path.parent)):
        assert cli.main(["run", str(small["log"]), "--out", out, "-q", "--jobs", "1", "--no-report"]) == 2
        assert "current folder" in capsys.readouterr().err
    assert list(tmp_path.iterdir()) == []


def test_a_symlinked_output_folder_is_replaced_where_it_points(small, previous, tmp_path):
    out, _ = previous
    link = tmp_path / "link"
    link.symlink_to(out, target_is_directory=True)
    write_outputs(small["outcome"], link, report=False, log_path=small["log"])
    assert link.is_symlink() and os.path.realpath(link) == str(out)
    assert not (out / "report.html").exists() and (out / "graph.json").is_file()


# --- output folder names of a batch (items: a name escaping --out, two logs with one name) ---------

@settings(max_examples=300, deadline=None)
@given(st.text(st.characters(blacklist_categories=("Cs",)), min_size=1, max_size=120))
def test_output_name_is_one_safe_path_component(name):
    name = name.replace("/", "_").replace("\x00", "_")
    safe = output_name(Path(name))
    assert safe not in ("", ".", "..") and not safe.startswith(".")
    assert "/" not in safe and "\\" not in safe and "\x00" not in safe
    assert all(c.isprintable() for c in safe) and len(safe) <= 80
    root = Path("/out")
    assert (root / safe).parent == root and os.path.normpath(root / safe).startswith("/out/")
    assert safe.casefold() != "index.html"


@settings(max_examples=200, deadline=None)
@given(st.lists(st.sampled_from(["ok.jsonl.gz", "OK.jsonl", "ok.jsonl", "ok-2.jsonl", "...jsonl", ".jsonl",
                                 "index.html.jsonl", "a b.jsonl", "ok"]), min_size=1, max_size=12),
       st.lists(st.sampled_from(["a", "b", "c/d"]), min_size=12, max_size=12))
def test_output_names_of_a_batch_are_unique(files, folders):
    paths = [Path(d) / f for d, f in zip(folders, files)]
    names = output_names(paths)
    assert len({n.casefold() for n in names}) == len(names)
    assert all(n == output_name(p) or n.startswith(output_name(p) + "-") for n, p in zip(names, paths))


def test_a_log_named_dots_stays_inside_out(small, tmp_path, capsys):
    logs = tmp_path / "logs"
    logs.mkdir()
    (logs / "...jsonl").write_bytes(small["tiny"].read_bytes())
    (logs / "b.jsonl.gz").write_bytes(small["tiny"].read_bytes())
    out = tmp_path / "sub" / "out"
    assert cli.main(["run", str(logs / "...jsonl"), str(logs / "b.jsonl.gz"), "--out", str(out), "-q",
                     "--jobs", "1", "--no-report"]) == 0
    assert sorted(p.name for p in (tmp_path / "sub").iterdir()) == ["out"]
    assert sorted(p.name for p in out.iterdir()) == ["b", "index.html", "log"]
    assert (out / "log" / "graph.json").is_file()


def test_two_logs_with_the_same_name_get_their_own_folders(tmp_path, capsys):
    for folder, seed, scans in (("a", 5, 50), ("b", 6, 70)):
        (tmp_path / folder).mkdir()
        write_scanlog(tmp_path / folder / "ok.jsonl.gz", simulate_log("ring", seed=seed, scans=scans))
    out = tmp_path / "D"
    assert cli.main(["run", str(tmp_path / "a" / "ok.jsonl.gz"), str(tmp_path / "b" / "ok.jsonl.gz"),
                     "--out", str(out), "-q", "--jobs", "1", "--no-report"]) == 0
    scans = {d: json.loads((out / d / "summary.json").read_text())["scans"] for d in ("ok", "ok-2")}
    assert scans == {"ok": 50, "ok-2": 70}
    index = (out / "index.html").read_text()
    assert "href='ok/summary.json'" in index and "href='ok-2/summary.json'" in index


def test_run_entries_match_what_a_run_writes(small):
    assert sorted(p.name for p in small["template"].iterdir()) == sorted(RUN_ENTRIES)


def test_pairs_writer_errors_are_untouched_by_the_folder_scheme(tmp_path):
    # A bad argument to a writer is a bug (ValueError), not a file-system error to rename.
    with pytest.raises(ValueError, match="verdict"):
        pairs_csv.write_candidates(tmp_path / "c.csv", [0], [1], ["maybe"], ["x"], [[0, 0, 0]])
