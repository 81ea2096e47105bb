"""Verification on every scenario, with and without injected wrong candidates.

For each scenario and seed a fresh log is simulated and run through the
pipeline; then the same log is run again with extra *look-alike* candidates
added until 50% and 90% of all candidates are wrong: pairs of keyframes that
are not revisits (more than 3 m or 30 degrees apart in truth) but whose
descriptors are among each other's nearest neighbours, i.e. places that look
the same. They are registered like any candidate, so they arrive with
plausible registrations.

Reported per run: false closures (accepted with a delta off the truth by
more than 0.3 m or 3 degrees), revisit-event recall, ATE of odometry, of
the optimised graph and of the graph a perfect verifier would build from the
same candidates, NEES of the accepted closures, the measured odometry heading
drift, time of the verification stage.

    python benchmarks/verification.py [--scenarios warehouse ring yard] [--seeds 21] [--jobs 2]
"""

from __future__ import annotations

import argparse
import sys
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

from closurecheck.config import RunConfig  # noqa: E402
from closurecheck.core import se2  # noqa: E402
from closurecheck.frontend.candidates import prepare, proposal_noise  # noqa: E402
from closurecheck.frontend.keyframes import select_keyframes  # noqa: E402
from closurecheck.io.pairs_csv import ExternalPairs  # noqa: E402
from closurecheck.pipeline import effective_noise, run_log  # noqa: E402
from closurecheck.reporting.scoring import score_closures  # noqa: E402
from closurecheck.reporting.trajectory import ate_rmse  # noqa: E402
from closurecheck.runners.factory import make_runner  # noqa: E402
from closurecheck.simulation.simulate import simulate_log  # noqa: E402
from closurecheck.verification.verify import optimise_closures  # noqa: E402


def look_alike_pairs(log, config: RunConfig, count: int, rng) -> ExternalPairs:
    """``count`` keyframe pairs that look alike but are not revisits."""
    from sklearn.neighbors import NearestNeighbors

    kf = select_keyframes(log.odom, config.keyframes)
    data = prepare(log, kf, proposal_noise(effective_noise(log, config.odometry)), config.descriptors)
    vec = data.descriptors.vectors
    k = min(25, len(kf) - 1)
    dist, idx = NearestNeighbors(n_neighbors=k + 1).fit(vec).kneighbors(vec)
    a = np.repeat(np.arange(len(kf)), k)
    b = idx[:, 1:].ravel()
    truth = log.truth[kf]
    d = se2.between(truth[a], truth[b])
    far = (np.hypot(d[:, 0], d[:, 1]) > 3.0) | (np.abs(d[:, 2]) > np.radians(30))
    apart = np.abs(a - b) > 20
    a, b = a[far & apart], b[far & apart]
    key = np.minimum(a, b) * len(kf) + np.maximum(a, b)
    _, first = np.unique(key, return_index=True)
    a, b = a[first], b[first]
    pick = rng.permutation(len(a))[:count]
    src, dst = kf[np.maximum(a[pick], b[pick])], kf[np.minimum(a[pick], b[pick])]
    return ExternalPairs(src=src, dst=dst, guess=np.full((len(src), 3), np.nan),
                         lines=np.arange(len(src)), source="injected")


def oracle_ate(log, out, right) -> float:
    """ATE of the graph a perfect verifier would build from the same candidates.

    Every candidate whose registration is right (``right``: within the
    false-closure bounds) and that converged is accepted, on the odometry the
    run used (drift removed, calibrated covariance), with the run's final
    robust optimisation.  What is left is error no loop closure among these
    candidates can remove: stretches of the route that are never revisited.
    """
    v, ver = out.verdicts, out.verification
    q = out.registrations.quality
    members = np.flatnonzero(right & q.valid & q.converged)
    index = {int(s): k for k, s in enumerate(out.keyframes)}
    src = np.array([index[int(s)] for s in v.src], dtype=np.intp)
    dst = np.array([index[int(d)] for d in v.dst], dtype=np.intp)
    _, poses, _, _ = optimise_closures(members, src, dst, v.delta, v.covariance, ver.odometry_poses,
                                       out.step_covariances * ver.odometry_scale, out.config.verify)
    return ate_rmse(poses, log.truth[out.keyframes])


def run_case(log, config, runner, external=None):
    t0 = time.perf_counter()
    out = run_log(log, config, external=external, runner=runner, also_propose=external is not None)
    total = time.perf_counter() - t0
    v = out.verdicts
    s = score_closures(log, out.keyframes, v.src, v.dst, v.accepted, v.delta, v.covariance, out.poses)
    td = se2.between(log.truth[v.src], log.truth[v.dst])
    err = se2.between(td, v.delta)
    wrong = ~((np.hypot(err[:, 0], err[:, 1]) <= 0.3) & (np.abs(err[:, 2]) <= np.radians(3)))
    s["ate_oracle_m"] = oracle_ate(log, out, ~wrong)
    return s, out, total, float(np.mean(wrong))


def _drift(d) -> str:
    if not np.isfinite(d.std_rad_per_m):
        return "—"
    text = f"{np.degrees(d.rate_rad_per_m) * 100:.2f} ± {np.degrees(d.std_rad_per_m) * 100:.2f}"
    return text + f", removed {np.degrees(d.removed_rad_per_m) * 100:.2f}"


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--scenarios", nargs="+", default=["warehouse", "ring", "yard"])
    ap.add_argument("--seeds", nargs="+", type=int, default=[21])
    ap.add_argument("--fractions", nargs="+", type=float, default=[0.5, 0.9])
    ap.add_argument("--jobs", type=int, default=2)
    ap.add_argument("--results", type=Path, default=ROOT / "benchmarks" / "results" / "verification.md")
    args = ap.parse_args(argv)

    config = RunConfig(jobs=args.jobs)
    runner = make_runner(args.jobs)
    rows = []
    try:
        for scen in args.scenarios:
            for seed in args.seeds:
                log = simulate_log(scen, seed=seed)
                s, out, total, wrong_frac = run_case(log, config, runner)
                rows.append((scen, seed, "none", wrong_frac, s, out, total))
                print(scen, seed, "none", {k: s[k] for k in ("accepted", "false_closures", "revisit_event_recall",
                                                           "ate_optimised_m")}, file=sys.stderr, flush=True)
                n_cand = len(out.verdicts)
                n_wrong_now = int(round(wrong_frac * n_cand))
                n_right = n_cand - n_wrong_now
                for frac in args.fractions:
                    extra = int(round(frac * n_right / (1 - frac))) - n_wrong_now
                    if extra <= 0:
                        rows.append((scen, seed, f"{frac:.0%} (already)", wrong_frac, s, out, total))
                        continue
                    pairs = look_alike_pairs(log, config, extra, np.random.default_rng(seed))
                    s2, out2, total2, wf2 = run_case(log, config, runner, pairs)
                    rows.append((scen, seed, f"{frac:.0%}", wf2, s2, out2, total2))
                    print(scen, seed, frac, {k: s2[k] for k in ("accepted", "false_closures",
                                                               "revisit_event_recall", "ate_optimised_m")},
                          file=sys.stderr, flush=True)
    finally:
        runner.close()

    lines = [
        "Verification benchmark (benchmarks/verification.py): fresh simulated logs, default settings, "
        f"{args.jobs} workers. 'injected' adds look-alike candidates (descriptor neighbours that are not "
        "revisits) until that share of all candidates registers wrong; 'wrong share' is the measured share of "
        "candidates whose registration is off the truth by > 0.3 m or > 3 deg. 'ATE perfect verifier' "
        "optimises every right candidate instead of the verified ones: the error left in stretches of the route "
        "that no candidate revisits. The simulated odometry drifts 2.29 deg per 100 m (0.0004 rad/m) on top of "
        "its noise.",
        "",
        "| scenario | seed | injected | candidates | wrong share | accepted | false closures | revisit events | "
        "event recall | ATE odometry (m) | ATE optimised (m) | ATE ratio | ATE perfect verifier (m) | mean NEES | "
        "odometry drift (deg/100 m) | verification (s) | run (s) |",
        "| --- | ---: | --- | ---: | ---: | ---: | ---: | ---: | ---: | ---: | ---: | ---: | ---: | ---: | ---: | "
        "---: | ---: |",
    ]
    for scen, seed, inj, wf, s, out, total in rows:
        lines.append(
            f"| {scen} | {seed} | {inj} | {s['candidates']} | {wf:.2f} | {s['accepted']} | {s['false_closures']} | "
            f"{s['revisit_events']} | {s['revisit_event_recall']:.3f} | {s['ate_odometry_m']:.3f} | "
            f"{s['ate_optimised_m']:.3f} | {s['ate_ratio']:.3f} | {s['ate_oracle_m']:.3f} | {s['nees_mean']:.2f} | "
            f"{_drift(out.verification.heading_drift)} | {out.timings.get('verification', float('nan')):.1f} | "
            f"{total:.0f} |")
    text = "\n".join(lines)
    print(text)
    args.results.parent.mkdir(parents=True, exist_ok=True)
    args.results.write_text(text + "\n")
    return 0


if __name__ == "__main__":
    sys.exit(main())
