"""Benchmark: one pair as a user calls it, against open3d, on every simulated scene (issue 14, target 1).

benchmarks/registration.py measures target 1 on dense office scans (721
beams, walls everywhere).  Our users' sites are also nearly empty: this
script takes near pairs from each of our simulated scenes (warehouse, open
yard, sparse hall, parking lot of posts, ring), where the scans hold from
about 70 to 720 points, and times the same calls (``register`` with the
coarse stage off and by default, and ``register_prepared`` on scans prepared
beforehand with the coarse stage off: the ICP stage) side by side with open3d's
point-to-point ``registration_icp`` (planar points with z = 0, at most 50
iterations, the same maximum correspondence distance as
benchmarks/registration.py), interleaved, each call ``--repeats`` times per
pair with the median kept.  A pair is two scans of one log whose true poses
lie 0.4-0.6 m apart; the guess is the true relative pose off by 0.28 m in a
random direction and 4 degrees either way, as in benchmarks/registration.py.
The ratio is the total time over the pairs divided by open3d's.

``--floor`` adds a second table, what the three calls would cost
with no Python or numpy around the compiled code: the same calls timed
with every compiled kernel of closurecheck.registration._kernels and the
coarse search (correlative.search, inside the default call) under a clock,
as ratios to open3d's time on the same pairs: the time inside the kernels
(their own argument and result conversion included) and the search alone.

Prints a markdown table; ``--results FILE`` also writes it.

Run from the repository root:  python benchmarks/registration_scenes.py [--pairs N] [--repeats N]
"""

from __future__ import annotations

import os

os.environ.setdefault("OMP_NUM_THREADS", "1")

import argparse  # noqa: E402
import statistics  # noqa: E402
import sys  # noqa: E402
import time  # noqa: E402
from contextlib import contextmanager  # noqa: E402
from functools import partial  # noqa: E402
from pathlib import Path  # noqa: E402

import numpy as np  # noqa: E402

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE.parent))
sys.path.insert(0, str(HERE))

import registration as bench  # noqa: E402  (open3d's call and clouds, the guess's error)

import closurecheck  # noqa: E402
from closurecheck.core import se2  # noqa: E402
from closurecheck.registration import _kernels, correlative  # noqa: E402
from closurecheck.registration.icp import RegistrationOptions, prepare_scan, register_prepared  # noqa: E402
from closurecheck.simulation.simulate import simulate_log  # noqa: E402

SCENES = ("warehouse", "yard", "hall", "lot", "ring")


def near_pairs(log, rng, n, lo_m=0.4, hi_m=0.6):
    """Up to n pairs (i, j, true pose of j in i's frame) with the true poses lo_m-hi_m apart."""
    found = []
    for i in range(0, len(log) - 1, 3):
        for j in range(i + 1, min(i + 30, len(log))):
            d = se2.between(log.truth[i], log.truth[j])
            if lo_m <= np.hypot(d[0], d[1]) <= hi_m:
                found.append((i, j, d))
                break
    pick = rng.choice(len(found), min(n, len(found)), replace=False)
    return [found[k] for k in pick]


def scene_row(scene, pairs_n, repeats, scans, seed):
    log = simulate_log(scene, seed=seed, scans=scans)
    rng = np.random.default_rng(seed)
    names = ("open3d", "coarse_off", "default", "prepared")
    prepared_opt = RegistrationOptions(coarse=False)
    times = {k: [] for k in names}
    errs = {k: [] for k in names}
    points = []
    flagged = []
    for i, j, truth in near_pairs(log, rng, pairs_n):
        pa, pb = np.ascontiguousarray(log.points(i)), np.ascontiguousarray(log.points(j))
        points.append(0.5 * (len(pa) + len(pb)))
        ang = rng.uniform(0.0, 2.0 * np.pi)
        guess = truth + np.array([bench.GUESS_ERROR_M * np.cos(ang), bench.GUESS_ERROR_M * np.sin(ang),
                                  np.radians(bench.GUESS_ERROR_DEG) * rng.choice([-1.0, 1.0])])
        ca, cb = bench._cloud(pa), bench._cloud(pb)
        # The ICP stage as benchmarks/registration.py times it: scans prepared beforehand (the target
        # side built), coarse stage off.
        ta, sb = prepare_scan(pa, prepared_opt), prepare_scan(pb, prepared_opt)
        calls = {"open3d": partial(bench.open3d_icp, cb, ca, guess),
                 "coarse_off": partial(closurecheck.register, pb, pa, guess, coarse=False),
                 "default": partial(closurecheck.register, pb, pa, guess),
                 "prepared": partial(register_prepared, sb, ta, guess, prepared_opt)}
        t = {k: [] for k in names}
        out = {}
        for _ in range(repeats):
            for k, call in calls.items():
                t0 = time.perf_counter()
                out[k] = call()
                t[k].append(time.perf_counter() - t0)
        for k in names:
            times[k].append(statistics.median(t[k]))
            errs[k].append(bench.errors(getattr(out[k], "delta", out[k]), truth)[0])
        flagged.append(not out["coarse_off"].converged or out["coarse_off"].degenerate)
    ref = sum(times["open3d"])
    return {"scene": scene, "pairs": len(points), "points": statistics.median(points),
            "flagged": float(np.mean(flagged)), "open3d_ms": 1e3 * statistics.median(times["open3d"]),
            **{f"{k}_ms": 1e3 * statistics.median(times[k]) for k in names[1:]},
            **{f"{k}_ratio": sum(times[k]) / ref for k in names[1:]},
            **{f"{k}_err_mm": 1e3 * statistics.median(errs[k]) for k in names}}


@contextmanager
def _clocked(spent):
    """Every compiled kernel of closurecheck.registration._kernels and correlative.search under a clock.

    ``spent`` (dict) gains seconds under "kernels" and "search".  The modules call kernels as attributes
    of _kernels (``_kernels.icp_line(...)``) and icp calls ``_coarse.search``, so replacing the attributes
    times every call from Python; kernels called by other kernels run inside them, uncounted twice.
    """
    originals = {name: f for name, f in vars(_kernels).items() if hasattr(f, "py_func") and hasattr(f, "signatures")}
    search = correlative.search

    def clock(f, key):
        def timed(*args, **kwargs):
            t0 = time.perf_counter()
            try:
                return f(*args, **kwargs)
            finally:
                spent[key] += time.perf_counter() - t0
        return timed

    for name, f in originals.items():
        setattr(_kernels, name, clock(f, "kernels"))
    correlative.search = clock(search, "search")
    try:
        yield
    finally:
        for name, f in originals.items():
            setattr(_kernels, name, f)
        correlative.search = search


def floor_row(scene, pairs_n, repeats, scans, seed):
    """Time inside the compiled kernels and in the coarse search, per call, against open3d (``--floor``)."""
    log = simulate_log(scene, seed=seed, scans=scans)
    rng = np.random.default_rng(seed)
    calls_of = ("coarse_off", "default", "prepared")
    prepared_opt = RegistrationOptions(coarse=False)
    sums = {k: 0.0 for k in ("open3d", *[f"{c}_{part}" for c in calls_of for part in ("call", "kernels", "search")])}
    n = 0
    for i, j, truth in near_pairs(log, rng, pairs_n):
        pa, pb = np.ascontiguousarray(log.points(i)), np.ascontiguousarray(log.points(j))
        ang = rng.uniform(0.0, 2.0 * np.pi)
        guess = truth + np.array([bench.GUESS_ERROR_M * np.cos(ang), bench.GUESS_ERROR_M * np.sin(ang),
                                  np.radians(bench.GUESS_ERROR_DEG) * rng.choice([-1.0, 1.0])])
        ca, cb = bench._cloud(pa), bench._cloud(pb)
        ta, sb = prepare_scan(pa, prepared_opt), prepare_scan(pb, prepared_opt)
        calls = {"coarse_off": partial(closurecheck.register, pb, pa, guess, coarse=False),
                 "default": partial(closurecheck.register, pb, pa, guess),
                 "prepared": partial(register_prepared, sb, ta, guess, prepared_opt)}
        per = {k: [] for k in sums}
        for _ in range(repeats):
            t0 = time.perf_counter()
            bench.open3d_icp(cb, ca, guess)
            per["open3d"].append(time.perf_counter() - t0)
            for name, call in calls.items():
                spent = {"kernels": 0.0, "search": 0.0}
                with _clocked(spent):
                    t0 = time.perf_counter()
                    call()
                    per[f"{name}_call"].append(time.perf_counter() - t0)
                per[f"{name}_kernels"].append(spent["kernels"])
                per[f"{name}_search"].append(spent["search"])
        for k in sums:
            sums[k] += statistics.median(per[k])
        n += 1
    ref = sums["open3d"]
    return {"scene": scene, "pairs": n, "open3d_ms": 1e3 * ref / n,
            **{f"{k}_ratio": v / ref for k, v in sums.items() if k != "open3d"},
            **{f"{k}_ms": 1e3 * v / n for k, v in sums.items() if k != "open3d"}}


def _scene_lines(row, args, line):
    """``line(row(scene, ...))`` for every scene, each printed as it comes."""
    out = []
    for scene in SCENES:
        out.append(line(row(scene, args.pairs, args.repeats, args.scans, args.seed)))
        print(out[-1], flush=True)
    return out


def floor_table(args):
    lines = ["| scene | pairs | open3d, ms (mean) | `coarse=False`: call, clocked / in kernels | ICP stage: call, "
             "clocked / in kernels | default: call, clocked / in kernels / the coarse search alone / the call "
             "without the search |",
             "| --- | ---: | ---: | --- | --- | --- |"]

    def line(r):
        ratios = [(f"{c}_call", f"{c}_kernels") for c in ("coarse_off", "prepared")]
        ratios.append(("default_call", "default_kernels", "default_search"))
        cells = [r["scene"], str(r["pairs"]), f"{r['open3d_ms']:.2f}"]
        cells += [" / ".join(f"{r[k + '_ratio']:.2f}" for k in keys) for keys in ratios]
        cells[-1] += (f" ({r['default_search_ms']:.2f} ms) / "
                      f"{r['default_call_ratio'] - r['default_search_ratio']:.2f}")
        return "| " + " | ".join(cells) + " |"

    lines += _scene_lines(floor_row, args, line)
    return ("\n## Without the glue (`--floor`)\n\nRatios to open3d's time on the same pairs (sums over the pairs "
            "of each call's median).  \"Call, clocked\": the call with the clocks on (a clock adds 0.2-0.3 µs "
            "to a kernel call); \"in kernels\": the time inside closurecheck.registration._kernels' compiled "
            "functions, their conversion of arguments and results included, which is what the call would "
            "cost with no Python or numpy around them; \"the coarse search alone\": correlative.search "
            "inside the default call.\n\n" + "\n".join(lines) + "\n")


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--pairs", type=int, default=40)
    ap.add_argument("--repeats", type=int, default=5)
    ap.add_argument("--scans", type=int, default=800, help="scans simulated per scene")
    ap.add_argument("--seed", type=int, default=7)
    ap.add_argument("--results", type=Path)
    ap.add_argument("--floor", action="store_true", help="also time the compiled kernels and the coarse search "
                    "inside the calls (a second table)")
    args = ap.parse_args(argv)
    # Compile and warm up on one pair, outside the timing.
    scene_row("ring", 1, 1, 60, args.seed)
    lines = ["| scene | pairs | points a scan (median) | open3d, ms | `coarse=False`: ratio (ms) | default: ratio (ms) "
             "| ICP stage: ratio (ms) | median error, mm: `coarse=False` / default / open3d "
             "| `coarse=False` not converged or degenerate |",
             "| --- | ---: | ---: | ---: | --- | --- | --- | --- | ---: |"]
    lines += _scene_lines(scene_row, args, lambda r: (
        f"| {r['scene']} | {r['pairs']} | {r['points']:.0f} | {r['open3d_ms']:.2f} "
        f"| {r['coarse_off_ratio']:.2f} ({r['coarse_off_ms']:.2f}) | {r['default_ratio']:.2f} "
        f"({r['default_ms']:.2f}) | {r['prepared_ratio']:.2f} ({r['prepared_ms']:.2f}) "
        f"| {r['coarse_off_err_mm']:.1f} / {r['default_err_mm']:.1f} / "
        f"{r['open3d_err_mm']:.1f} | {r['flagged']:.0%} |"))
    text = ("# One pair as a user calls it, on every simulated scene\n\n"
            f"`python benchmarks/registration_scenes.py --pairs {args.pairs} --repeats {args.repeats} "
            f"--scans {args.scans} --seed {args.seed}{' --floor' if args.floor else ''}`; targets (issue 14): "
            "`coarse=False` <= 1.0, default <= 2.5, the ICP stage on prepared scans <= 0.4 times open3d's "
            "point-to-point ICP.\n\n"
            + "\n".join(lines) + "\n")
    if args.floor:
        text += floor_table(args)
    publish(text, args.results)


def publish(text: str, results: Path | None):
    """Print the markdown ``text`` after the rows printed as they came, and write it to ``results`` if given."""
    if results:
        results.write_text(text, encoding="utf-8")
    print()
    print(text)


if __name__ == "__main__":
    main()
