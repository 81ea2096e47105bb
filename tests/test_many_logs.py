"""A folder of logs through `closurecheck run`: a bad log is reported and the others finish.

Contract (docs/formats.md, section 2): exit status 2 when an input is bad;
each good log gets its own complete output folder under --out; an index page
links the runs and states the failure; the error is one line on stderr
naming the file and the line.
"""

import json

import pytest

from closurecheck import cli
from closurecheck.io.scanlog import write_scanlog
from closurecheck.simulation.simulate import simulate_log

SCANS = 250
BAD_LINE = 40  # line number in the file (the header is line 1)


@pytest.fixture(scope="module")
def batch(tmp_path_factory):
    base = tmp_path_factory.mktemp("fleet")
    folder = base / "logs"
    folder.mkdir()
    write_scanlog(folder / "north_aisle.jsonl", simulate_log("warehouse", seed=21, scans=SCANS))
    write_scanlog(folder / "loading_dock.jsonl.gz", simulate_log("ring", seed=22, scans=SCANS))
    bad = folder / "night_shift.jsonl"
    write_scanlog(bad, simulate_log("yard", seed=23, scans=SCANS))
    lines = bad.read_text().splitlines()
    scan = json.loads(lines[BAD_LINE - 1])
    scan["ranges"] = scan["ranges"][:-3]  # three beams short of the header's count
    lines[BAD_LINE - 1] = json.dumps(scan)
    bad.write_text("\n".join(lines) + "\n")
    # Something that is not a log in the same folder is not taken for one.
    (folder / "README.txt").write_text("shift logs of the invented depot\n")
    return base, folder


def test_folder_with_a_malformed_log(batch, capsys):
    base, folder = batch
    out = base / "out"
    status = cli.main(["run", str(folder), "--out", str(out), "-q", "--no-report"])
    captured = capsys.readouterr()
    assert status == 2

    for name in ("north_aisle", "loading_dock"):
        run = out / name
        for f in ("graph.json", "candidates.csv", "summary.json"):
            assert (run / f).is_file(), f"{name}/{f} missing"
        doc = json.loads((run / "graph.json").read_text())
        assert doc["graph"] == 1 and len(doc["nodes"]) > 10
        summary = json.loads((run / "summary.json").read_text())
        assert summary["scans"] == SCANS
        assert not (run / "report.html").exists()  # --no-report
        assert not [p for p in run.iterdir() if p.name.endswith(".part")], "no temporary files left behind"
    assert not (out / "night_shift").exists()

    index = (out / "index.html").read_text()
    for name in ("north_aisle", "loading_dock", "night_shift"):
        assert name in index
    assert "failed" in index and "night_shift.jsonl:40" in index

    err_lines = [ln for ln in captured.err.splitlines() if ln.strip()]
    assert len(err_lines) == 1, captured.err
    assert err_lines[0].startswith("closurecheck: error: ")
    assert f"night_shift.jsonl:{BAD_LINE}" in err_lines[0] and "beam" in err_lines[0]
    assert captured.out == ""  # -q
