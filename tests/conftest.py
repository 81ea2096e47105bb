"""Shared fixtures: one small generated log run end to end, reused by several test files."""

import pytest

from closurecheck import cli
from closurecheck.io.scanlog import write_scanlog
from closurecheck.simulation.simulate import simulate_log

# A ring-corridor log with a seed other than the demo's; 900 scans reach the
# first revisits of the second lap.
E2E_SCENARIO, E2E_SEED, E2E_SCANS = "ring", 11, 900


@pytest.fixture(scope="session")
def e2e_run(tmp_path_factory):
    """(base folder, log path, output folder) of `closurecheck run` on the shared log."""
    base = tmp_path_factory.mktemp("e2e")
    log = base / "ring.jsonl.gz"
    write_scanlog(log, simulate_log(E2E_SCENARIO, seed=E2E_SEED, scans=E2E_SCANS))
    out = base / "out"
    assert cli.main(["run", str(log), "--out", str(out), "-q"]) == 0
    return base, log, out
