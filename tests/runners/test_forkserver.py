"""The pool's fork server started first of all (runners/forkserver.py).

`closurecheck run` starts it before importing the pipeline so that the two
start-ups overlap; that only works while the module stays light and the
pool reuses the fork server it started.
"""

from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path

import pytest

from closurecheck.runners.forkserver import start_early

ROOT = Path(__file__).resolve().parents[2]


def _python(code: str) -> str:
    env = dict(os.environ, PYTHONPATH=str(ROOT))
    done = subprocess.run([sys.executable, "-c", code], env=env, capture_output=True, text=True, timeout=120)
    assert done.returncode == 0, done.stderr[-2000:]
    return done.stdout


def test_the_module_imports_without_numpy_scipy_or_the_pipeline():
    out = _python("import sys, closurecheck.runners.forkserver\n"
                  "heavy = ('numpy', 'scipy', 'sklearn', 'numba', 'closurecheck.pipeline',\n"
                  "         'closurecheck.runners.pool')\n"
                  "print(sorted(m for m in heavy if m in sys.modules))")
    assert out.strip() == "[]"


@pytest.mark.parametrize("jobs, dask", [(1, None), (-2, None), (2, "local"), (0, "tcp://127.0.0.1:1")])
def test_no_fork_server_for_serial_dask_or_refused_runs(jobs, dask):
    assert start_early(jobs, dask) is False


@pytest.mark.skipif(not sys.platform.startswith("linux"), reason="the fork server start method (Linux)")
def test_the_pool_uses_the_fork_server_started_early():
    # The fork server's pid before and after a pool is made and has run a batch: one and the same.
    out = _python(
        "from multiprocessing import forkserver\n"
        "from closurecheck.runners.forkserver import start_early\n"
        "assert start_early(2, None)\n"
        "first = forkserver._forkserver._forkserver_pid\n"
        "import closurecheck\n"
        "from closurecheck.runners.pool import PoolRunner\n"
        "from closurecheck.registration.icp import DEFAULT_OPTIONS\n"
        "from closurecheck.core import se2\n"
        "log = closurecheck.simulate_log('ring', seed=4, scans=40)\n"
        "runner = PoolRunner(2)\n"
        "pts = {k: log.points(k) for k in (10, 12)}\n"
        "res = runner.register(pts, [12], [10], [se2.between(log.odom[10], log.odom[12])[None]], DEFAULT_OPTIONS, 8)\n"
        "print(first, forkserver._forkserver._forkserver_pid, res[0] is not None)\n")
    first, after, registered = out.split()
    assert first == after and int(first) > 0 and registered == "True"
