"""The shipped demo log's results, held against a stored record.

Refactoring must not change what the tool decides: the verdict of every
candidate and the optimised poses (to 10 micrometres, far below anything a
user would see).  A change that is meant to alter results updates the record
in the same commit:

    CLOSURECHECK_UPDATE_DEMO_RECORD=1 .venv/bin/python -m pytest tests/test_demo_record.py

Machines differ in the last bits of their floating point (vector units,
BLAS kernels), and a decision that sits exactly on its bound can go either
way: on an AMD EPYC machine without AVX-512 (2026-12-03), two of the 2,712
demo candidates went from not_converged to odometry_gate against the record
made on the previous machine (their ICP met its step tolerance on one and
not on the other), and the poses rounded to a micrometre hashed
differently, though the accepted set was the same.  On another AMD EPYC
machine (2026-12-04) the record's own commit gave five such flips among
rejection reasons (not_converged, ambiguous, degenerate, pair_inconsistent;
the second-best fit of the ninth round's rival rule sits near its bound
for a few pairs), the same accepted set and poses within the tolerance.  So the record holds every verdict and every
pose, and the test allows what such bits can do and nothing more: the same
accepted pairs, at most ``MAX_REASON_FLIPS`` rejected candidates with
another rejection reason, poses within ``POSE_TOLERANCE``.
"""

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


# Rejected candidates whose reason may differ between machines (0.3% of the demo's; 5 seen).
MAX_REASON_FLIPS = 8
# Metres and radians; the optimiser stops at 1e-10 relative change, far below this.
POSE_TOLERANCE = 1e-5


@pytest.mark.slow
def test_demo_results_match_the_record():
    runner = make_runner(2)
    try:
        out = run_log(read_scanlog(DEMO_LOG), RunConfig(jobs=2), runner=runner)
    finally:
        runner.close()
    v = out.verdicts
    verdicts = [f"{a},{b},{r}" for a, b, r in zip(v.src.tolist(), v.dst.tolist(), v.reason.astype(str))]
    # round() then + 0.0 turns -0.0 into 0.0.
    poses = [[round(x, 6) + 0.0 for x in p] for p in np.asarray(out.poses).tolist()]
    got = {"candidates": len(v), "accepted": int(v.accepted.sum()), "reasons": v.counts(),
           "verdicts": verdicts, "poses": poses}
    if os.environ.get("CLOSURECHECK_UPDATE_DEMO_RECORD") == "1":
        RECORD.write_text(json.dumps(got, indent=0) + "\n")
    record = json.loads(RECORD.read_text())
    assert got["candidates"] == record["candidates"]
    pair = [row.rsplit(",", 1) for row in verdicts]
    ref = [row.rsplit(",", 1) for row in record["verdicts"]]
    assert [p for p, _ in pair] == [p for p, _ in ref], "the candidate pairs changed"
    accepted = {p for p, r in pair if r == "accepted"}
    assert accepted == {p for p, r in ref if r == "accepted"}, "the accepted set changed"
    flips = [(p, r0, r1) for (p, r1), (_, r0) in zip(pair, ref) if r0 != r1]
    assert len(flips) <= MAX_REASON_FLIPS, f"{len(flips)} verdicts changed, e.g. {flips[:5]}"
    np.testing.assert_allclose(np.asarray(poses), np.asarray(record["poses"]), rtol=0, atol=POSE_TOLERANCE)
