"""The shipped demo log's results, held against a stored record.

Refactoring must not change what the tool decides: the verdict of every
candidate and the optimised poses (to a micrometre, far above the last-bit
differences between machines' floating point, far below anything a user
would see).  A change that is meant to alter results updates the record in
the same commit:

    CLOSURECHECK_UPDATE_DEMO_RECORD=1 .venv/bin/python -m pytest tests/test_demo_record.py
"""

import hashlib
import json
import os
from pathlib import Path

import numpy as np
import pytest

from closurecheck.config import RunConfig
from closurecheck.io.inputs import DEMO_LOG
from closurecheck.io.scanlog import read_scanlog
from closurecheck.pipeline import run_log
from closurecheck.runners.factory import make_runner

RECORD = Path(__file__).parent / "data" / "demo_record.json"


def _digest(rows) -> str:
    return hashlib.sha256("\n".join(rows).encode()).hexdigest()


@pytest.mark.slow
def test_demo_results_match_the_record():
    runner = make_runner(2)
    try:
        out = run_log(read_scanlog(DEMO_LOG), RunConfig(jobs=2), runner=runner)
    finally:
        runner.close()
    v = out.verdicts
    verdict_rows = [f"{a},{b},{r}" for a, b, r in zip(v.src.tolist(), v.dst.tolist(), v.reason.astype(str))]
    # round() then + 0.0 turns -0.0 into 0.0, so a sign flip of a value within
    # 1e-14 of zero cannot change the text.
    pose_rows = [",".join(f"{round(x, 6) + 0.0:.6f}" for x in p) for p in np.asarray(out.poses).tolist()]
    got = {"candidates": len(v), "accepted": int(v.accepted.sum()), "reasons": v.counts(),
           "verdicts_sha256": _digest(verdict_rows), "poses_um_sha256": _digest(pose_rows)}
    if os.environ.get("CLOSURECHECK_UPDATE_DEMO_RECORD") == "1":
        RECORD.write_text(json.dumps(got, indent=1) + "\n")
    assert got == json.loads(RECORD.read_text())
