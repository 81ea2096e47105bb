"""The local process pool as an operating-system citizen: its processes end with the run, and they
import the same closurecheck as the main process whatever the current folder holds.

Each test runs `closurecheck run --jobs 2` in a subprocess of its own.
"""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import pytest

from closurecheck.io.scanlog import write_scanlog
from procs import alive, descendants  # tests/procs.py
from closurecheck.simulation.simulate import simulate_log

ROOT = Path(__file__).resolve().parents[2]
pytestmark = pytest.mark.skipif(not sys.platform.startswith("linux"), reason="reads /proc (Linux)")


@pytest.fixture(scope="module")
def ring_log(tmp_path_factory):
    path = tmp_path_factory.mktemp("pool") / "ring.jsonl.gz"
    write_scanlog(path, simulate_log("ring", seed=4, scans=300))
    return path


def start_run(log, out, *, cwd=None, env=None, extra=()):
    args = [sys.executable, "-m", "closurecheck", "run", str(log), "--out", str(out), "--jobs", "2", *extra]
    base = dict(os.environ, PYTHONPATH=str(ROOT))
    return subprocess.Popen(args, cwd=cwd or out.parent, env=env or base, stdout=subprocess.DEVNULL,
                            stderr=subprocess.PIPE, text=True)


def wait_for(proc, marker: str, timeout_s: float = 120.0) -> list[str]:
    """Stderr lines up to and including the first that contains ``marker``."""
    lines, t0 = [], time.monotonic()
    for line in proc.stderr:
        lines.append(line)
        if marker in line or time.monotonic() - t0 > timeout_s:
            break
    return lines


@pytest.mark.slow
@pytest.mark.parametrize("sig", [signal.SIGKILL, signal.SIGTERM], ids=["SIGKILL", "SIGTERM"])
def test_pool_processes_die_with_a_killed_main_process(ring_log, tmp_path, sig):
    # Killing the main process alone used to leave the fork server and the
    # workers asleep for good (hundreds of MB).
    proc = start_run(ring_log, tmp_path / "out")
    children: list[int] = []
    try:
        # The first batch is back: the pool is registering (the odometry calibration's pairs).
        seen = wait_for(proc, "pairs; at the first batch's pace")
        assert "first batch" in seen[-1], "".join(seen)
        children = descendants(proc.pid)
        assert len(children) >= 3, children  # fork server and two workers (and the resource tracker)
        os.kill(proc.pid, sig)
        proc.wait(timeout=30)
        deadline = time.monotonic() + 10.0
        while time.monotonic() < deadline and any(alive(c) for c in children):
            time.sleep(0.1)
        survivors = [c for c in children if alive(c)]
    finally:
        for c in descendants(proc.pid) + children:
            if alive(c):
                os.kill(c, signal.SIGKILL)
        if proc.poll() is None:
            proc.kill()
    assert survivors == []
    assert not (tmp_path / "out").exists()


SITECUSTOMIZE = '''
# closurecheck importable only through a finder placed after the path finder,
# as an editable install does: a folder named closurecheck in the current
# folder then wins in any process that has the current folder on sys.path.
import importlib.machinery, os, sys

class _Finder:
    @classmethod
    def find_spec(cls, name, path=None, target=None):
        if name == "closurecheck":
            return importlib.machinery.PathFinder.find_spec(name, [os.environ["CC_TEST_ROOT"]])
        return None

sys.meta_path.insert(sys.meta_path.index(importlib.machinery.PathFinder) + 1, _Finder)
'''

MAIN = '''
import sys
from closurecheck.cli import main

if __name__ == "__main__":
    sys.exit(main())
'''


@pytest.mark.slow
def test_workers_import_the_package_whatever_the_current_folder_holds(ring_log, tmp_path):
    # The parent folder of a clone holds a folder named "closurecheck"
    # (without __init__.py): the fork server's sys.path started with the
    # current folder, so workers imported that folder instead of the package.
    site = tmp_path / "site"
    site.mkdir()
    (site / "sitecustomize.py").write_text(SITECUSTOMIZE)
    (tmp_path / "main.py").write_text(MAIN)
    work = tmp_path / "work"
    (work / "closurecheck").mkdir(parents=True)
    (work / "closurecheck" / "README.md").write_text("a clone, not the package\n")
    env = dict(os.environ, PYTHONPATH=str(site), CC_TEST_ROOT=str(ROOT))
    out = tmp_path / "out"
    res = subprocess.run([sys.executable, str(tmp_path / "main.py"), "run", str(ring_log), "--out", str(out),
                          "--jobs", "2", "-q", "--no-report"], cwd=work, env=env, capture_output=True, text=True,
                         timeout=600)
    assert res.returncode == 0, res.stderr
    assert (out / "graph.json").is_file()
