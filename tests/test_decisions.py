"""Reviewer decisions end to end (``closurecheck run --decisions``, docs/verification.md "Reviewer decisions").

Runs verify a few dozen pairs of the shared e2e log (a pairs file instead of
the proposer keeps each run to seconds): a forced rejection removes exactly
that edge, a forced acceptance of a true pair the run did not consider adds
it, an acceptance registration cannot align is refused naming the row, bad
files are refused with one line, and the run's config.toml repeats the run.
"""

import csv
import dataclasses
import json

import numpy as np
import pytest

from closurecheck import cli
from closurecheck.config import RunConfig
from closurecheck.io.decisions_csv import read_decisions
from closurecheck.io.graph_file import read_graph
from closurecheck.io.pairs_csv import read_pairs
from closurecheck.io.scanlog import read_scanlog, write_scanlog
from closurecheck.pipeline import run_log
from closurecheck.reporting.scoring import closure_errors


def _loops(graph):
    return {(int(a), int(b)) for a, b in zip(graph.src[graph.loop_mask], graph.dst[graph.loop_mask])}


def _unordered(pairs):
    return {(min(a, b), max(a, b)) for a, b in pairs}


@pytest.fixture(scope="module")
def setup(e2e_run, tmp_path_factory):
    base, log_path, out = e2e_run
    work = tmp_path_factory.mktemp("decisions")
    with open(out / "candidates.csv", newline="") as fh:
        rows = list(csv.DictReader(fh))
    accepted = [(int(r["from"]), int(r["to"])) for r in rows if r["verdict"] == "accepted"]
    rejected = [(int(r["from"]), int(r["to"])) for r in rows if r["verdict"] == "rejected"]
    assert len(accepted) > 30 and len(rejected) > 10
    chosen = accepted[:24] + rejected[:10]
    pairs = work / "pairs.csv"
    pairs.write_text("from,to\n" + "".join(f"{a},{b}\n" for a, b in chosen))
    log = read_scanlog(log_path)
    config = RunConfig(jobs=1)
    external = read_pairs(pairs, len(log))
    plain = run_log(log, config, external=external)
    return {"log": log, "log_path": log_path, "work": work, "pairs": pairs, "external": external, "config": config,
            "plain": plain, "unused_accepted": accepted[24:]}


def _decide(setup, name, text):
    path = setup["work"] / name
    path.write_text(text)
    return read_decisions(path)


def test_a_forced_rejection_removes_exactly_that_edge(setup):
    plain = setup["plain"]
    before = _loops(plain.graph)
    victim = sorted(before)[3]
    decisions = _decide(setup, "reject.csv", f"from,to,decision,note\n{victim[1]},{victim[0]},reject,double wall\n")
    out = run_log(setup["log"], setup["config"], external=setup["external"], decisions=decisions)
    assert _loops(out.graph) == before - {victim}
    v = out.verdicts
    k = int(np.flatnonzero((v.src == victim[0]) & (v.dst == victim[1]))[0])
    assert (v.reason[k], v.verifier_reason[k], v.review_note[k]) == ("reviewer_rejected", "accepted", "double wall")
    assert not v.accepted[k]
    # The other pairs' verdicts are what the checks alone say.
    others = np.arange(len(v)) != k
    np.testing.assert_array_equal(v.reason[others], v.verifier_reason[others])


def test_a_forced_acceptance_of_a_true_pair_the_run_did_not_consider_adds_it(setup):
    plain = setup["plain"]
    log = setup["log"]
    new = setup["unused_accepted"][0]
    assert new not in _loops(plain.graph)
    decisions = _decide(setup, "accept.csv", f"from,to,decision\n{new[0]},{new[1]},accept\n")
    out = run_log(log, setup["config"], external=setup["external"], decisions=decisions)
    assert _loops(out.graph) == _loops(plain.graph) | {new}
    v = out.verdicts
    k = int(np.flatnonzero((v.src == new[0]) & (v.dst == new[1]))[0])
    assert v.reason[k] == "reviewer_accepted" and v.accepted[k] and "reviewer" in v.origin[k]
    # Registered first: its edge carries the registered delta, which matches the truth (within the scoring's
    # tolerance, docs/scoring.md).
    et, eh, _ = closure_errors(log.truth, v.src[[k]], v.dst[[k]], v.delta[[k]])
    assert et[0] <= 0.3 and eh[0] <= np.radians(3.0)
    assert len(v) == len(plain.verdicts) + 1


def _cli_run(setup, out, *extra):
    return cli.main(["run", str(setup["log_path"]), "--candidates", str(setup["pairs"]), "--out", str(out),
                     "--jobs", "1", "--no-report", "-q", *extra])


def test_config_toml_repeats_the_decisions_even_after_the_file_changes(setup, tmp_path):
    victim = sorted(_loops(setup["plain"].graph))[0]
    new = setup["unused_accepted"][1]
    dec = tmp_path / "decisions.csv"
    dec.write_text(f"from,to,decision,note\n{victim[0]},{victim[1]},reject,\n{new[1]},{new[0]},accept,\"ok, seen\"\n")
    assert _cli_run(setup, tmp_path / "a", "--decisions", str(dec)) == 0
    assert _cli_run(setup, tmp_path / "b", "--decisions", str(dec)) == 0
    dec.write_text("from,to,decision\n")  # the file changes: the recorded run does not
    assert _cli_run(setup, tmp_path / "c", "--config", str(tmp_path / "a" / "config.toml")) == 0
    graphs = [json.loads((tmp_path / d / "graph.json").read_text()) for d in "abc"]
    assert graphs[0] == graphs[1] == graphs[2]
    loops = _unordered(_loops(read_graph(tmp_path / "a" / "graph.json")))
    victim, new = (min(victim), max(victim)), (min(new), max(new))
    assert victim not in loops and new in loops
    with open(tmp_path / "c" / "candidates.csv", newline="") as fh:
        rows = {(min(int(r["from"]), int(r["to"])), max(int(r["from"]), int(r["to"]))): r for r in csv.DictReader(fh)}
    assert rows[new]["reason"] == "reviewer_accepted" and rows[new]["review_note"] == "ok, seen"
    assert rows[victim]["reason"] == "reviewer_rejected"


def test_accepting_a_pair_registration_cannot_align_is_refused_naming_the_row(setup, tmp_path, capsys):
    # Scan 450 loses every return: registration has nothing to align.
    log = setup["log"]
    ranges = log.ranges.copy()
    ranges[450] = np.nan
    blind = tmp_path / "blind.jsonl.gz"
    write_scanlog(blind, dataclasses.replace(log, ranges=ranges))
    dec = tmp_path / "decisions.csv"
    dec.write_text("from,to,decision\n450,3,reject\n450,150,accept\n")
    out = tmp_path / "out"
    code = cli.main(["run", str(blind), "--candidates", str(setup["pairs"]), "--decisions", str(dec),
                     "--out", str(out), "--jobs", "1", "-q"])
    err = capsys.readouterr().err.strip()
    assert code == 2
    assert err.count("\n") == 0
    assert f"{dec}:3:" in err and "no alignment" in err and "(450, 150)" in err
    assert not (out / "graph.json").exists()


@pytest.mark.parametrize("text, line, needle", [
    ("from,to,decision\n3,150,accept\n3,150,maybe\n", 3, "must be accept or reject"),
    ("from,to,decision\n3,150,accept\n3,99999,reject\n", 3, "unknown scan id 99999"),
    ("from,to,decision\n3,150,accept\n150,3,reject\n", 3, "decided twice, differently"),
    ("from,to,note\n3,150,fine\n", 1, 'missing column "decision"'),
])
def test_malformed_decisions_are_refused_in_one_line(setup, tmp_path, capsys, text, line, needle):
    dec = tmp_path / "decisions.csv"
    dec.write_text(text)
    out = tmp_path / "out"
    assert _cli_run(setup, out, "--decisions", str(dec)) == 2
    err = capsys.readouterr().err.strip()
    assert err.count("\n") == 0 and err.startswith("closurecheck: error: ")
    assert f"{dec}:{line}:" in err and needle in err
    assert not (out / "graph.json").exists()
