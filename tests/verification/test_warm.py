"""Loading what the stages after registration need while the workers register.

verification/warm.py must load the pair test's kernel with the argument
types of a real run (else the real run loads another specialisation anyway),
and the pipeline's load-ahead thread must load the drawing code only when a
report follows.  Each check runs in a fresh process, where nothing is loaded.
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
from pathlib import Path

ROOT = Path(__file__).resolve().parents[2]


def _python(code: str) -> str:
    env = dict(os.environ, PYTHONPATH=str(ROOT))
    done = subprocess.run([sys.executable, "-c", code], env=env, capture_output=True, text=True, timeout=300)
    assert done.returncode == 0, done.stderr[-2000:]
    return done.stdout.strip()


def test_warm_loads_the_kernels_a_real_pair_test_calls():
    out = _python(
        "import numpy as np, closurecheck\n"
        "from closurecheck.core import se2\n"
        "from closurecheck.verification import _pcm_kernels as k\n"
        "from closurecheck.verification.consistency import pairwise_consistency\n"
        "from closurecheck.verification.warm import warm_kernels\n"
        "kernels = (k.failing_pairs, k.symmetric_csr)\n"
        "before = [len(f.signatures) for f in kernels]\n"
        "warm_kernels()\n"
        "warm = [len(f.signatures) for f in kernels]\n"
        # A larger invented problem: 40 closures along a 60-pose corridor, some of them off.
        "rng = np.random.default_rng(2)\n"
        "poses = np.column_stack([np.arange(60.0), rng.normal(0, 0.1, 60), rng.normal(0, 0.01, 60)])\n"
        "prefix = se2.chain_prefix(poses, np.tile(np.diag([1e-3, 1e-3, 1e-5]), (59, 1, 1)))\n"
        "src = rng.integers(0, 30, 40); dst = src + rng.integers(5, 29, 40)\n"
        "d = se2.between(poses[src], poses[dst]); d[::5, 0] += 2.0\n"
        "pairwise_consistency(src, dst, d, np.tile(np.diag([1e-3, 1e-3, 1e-4]), (40, 1, 1)), poses, prefix)\n"
        "import json\n"
        "print(json.dumps([before, warm, [len(f.signatures) for f in kernels]]))\n")
    before, warm, real = json.loads(out.splitlines()[-1])
    assert before == [0, 0]
    assert all(n >= 1 for n in warm)
    assert real == warm      # the real call needed no other specialisation


def test_the_drawing_code_is_loaded_ahead_only_for_a_report():
    code = (
        "import sys, closurecheck\n"
        "from closurecheck.config import RunConfig\n"
        "from closurecheck.pipeline import run_log\n"
        "from closurecheck.runners.pool import PoolRunner\n"
        "if __name__ == '__main__':\n"
        "    log = closurecheck.simulate_log('ring', seed=4, scans=200)\n"
        "    runner = PoolRunner(2)\n"
        "    run_log(log, RunConfig(jobs=2), runner=runner, report={report})\n"
        "    runner.close()\n"
        "    print('matplotlib.figure' in sys.modules)\n")
    assert _python(code.format(report=True)).splitlines()[-1] == "True"
    assert _python(code.format(report=False)).splitlines()[-1] == "False"
