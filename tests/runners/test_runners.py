"""Serial, local pool and Dask runners give the same run, bit for bit.

The reference is the serial run in this process: each pair's registration
depends only on its two scans, its seeds and the options, so a pool of
worker processes or a Dask cluster must reproduce it exactly (verdicts,
registered deltas and covariances, optimised poses), whatever the batch
order and the worker that ran a batch.

To keep the file quick, one small generated log is shared by every test and
only every fourth proposed candidate is registered (given to the run as an
external pairs list); the subset still holds accepted closures and every
kind of rejection the small log produces.
"""

import dataclasses
import sys
from dataclasses import astuple

import numpy as np
import pytest

from closurecheck.config import RunConfig
from closurecheck.core import se2
from closurecheck.errors import InputError
from closurecheck.frontend.candidates import prepare, proposal_noise, propose_for
from closurecheck.frontend.keyframes import select_keyframes
from closurecheck.io.pairs_csv import ExternalPairs
from closurecheck.pipeline import effective_noise, run_log
from closurecheck.registration.batch import register_batch
from closurecheck.registration.icp import prepare_scan
from closurecheck.runners.factory import make_runner
from closurecheck.runners.pool import PoolRunner
from closurecheck.runners.serial import SerialRunner
from closurecheck.runners.work import HeldScans, PointsTable, Regions, ScanCache, locality_order
from closurecheck.simulation.simulate import simulate_log

SCENARIO, SEED, SCANS, STRIDE = "ring", 3, 700, 4
# Small batches so that each worker runs several and they finish out of order.
CONFIG = RunConfig(jobs=1, batch_pairs=6)


@pytest.fixture(scope="module")
def case():
    log = simulate_log(SCENARIO, seed=SEED, scans=SCANS)
    kf = select_keyframes(log.odom, CONFIG.keyframes)
    data = prepare(log, kf, proposal_noise(effective_noise(log, CONFIG.odometry)), CONFIG.descriptors)
    cands = propose_for(data, CONFIG.candidates)
    sel = np.arange(0, len(cands), STRIDE)
    pairs = ExternalPairs(src=cands.src[sel], dst=cands.dst[sel], guess=np.full((len(sel), 3), np.nan),
                          lines=sel + 2, source="every fourth candidate")
    serial = run_log(log, CONFIG, external=pairs, runner=SerialRunner())
    return {"log": log, "pairs": pairs, "serial": serial}


def _assert_same_run(a, b):
    va, vb = a.verdicts, b.verdicts
    np.testing.assert_array_equal(va.src, vb.src)
    np.testing.assert_array_equal(va.dst, vb.dst)
    np.testing.assert_array_equal(va.accepted, vb.accepted)
    np.testing.assert_array_equal(va.reason.astype(str), vb.reason.astype(str))
    # Bit for bit: array_equal, not allclose (NaN where a pair has no result).
    assert np.array_equal(va.delta, vb.delta, equal_nan=True)
    assert np.array_equal(va.covariance, vb.covariance, equal_nan=True)
    assert np.array_equal(a.registrations.quality.iterations, b.registrations.quality.iterations)
    assert np.array_equal(a.poses, b.poses)
    assert np.array_equal(a.graph.information, b.graph.information)


def test_the_shared_case_exercises_the_verdicts(case):
    v = case["serial"].verdicts
    reasons = set(v.reason.astype(str))
    assert v.accepted.sum() >= 3, "the subset must hold accepted closures for the pose comparison to mean anything"
    assert len(reasons - {"accepted"}) >= 3
    # The accepted closures moved the map: the optimised poses differ from odometry.
    assert np.abs(case["serial"].poses - case["serial"].odom).max() > 0.05


def test_pool_of_two_matches_serial(case):
    runner = make_runner(2)
    assert isinstance(runner, PoolRunner) and runner.workers == 2
    try:
        pooled = run_log(case["log"], CONFIG, external=case["pairs"], runner=runner)
    finally:
        runner.close()
    _assert_same_run(case["serial"], pooled)


def test_dask_local_cluster_matches_serial(case):
    pytest.importorskip("distributed", reason="the optional extra closurecheck[dask] is not installed")
    from closurecheck.runners.dask_cluster import DaskRunner

    runner = make_runner(2, dask="local")
    assert isinstance(runner, DaskRunner) and runner.workers == 2
    try:
        distributed = run_log(case["log"], CONFIG, external=case["pairs"], runner=runner)
        # Each worker dropped the log's prepared scans once the log was done.
        left = runner.client.run(_cached_runs)
        # A second client reaching the same cluster by its tcp:// address, as
        # `--dask tcp://HOST:PORT` does, on a few pairs.
        remote = DaskRunner(runner.cluster.scheduler_address)
        try:
            assert remote.workers == 2
            few = _few_pairs(case)
            by_address = remote.register(*few, CONFIG.registration, 2)
            # Counted over the workers: each scan prepared at least once (in one or both workers).
            few_builds = remote.last_builds
        finally:
            remote.close()
    finally:
        runner.close()
    _assert_same_run(case["serial"], distributed)
    assert few_builds >= len(few[0])
    assert left and set(left.values()) == {0}
    reference = SerialRunner().register(*few, CONFIG.registration, 2)
    assert len(by_address) == len(reference)
    for ra, rb in zip(reference, by_address):
        assert (ra is None) == (rb is None)
        assert ra is None or all(np.array_equal(x, y) for x, y in zip(astuple(ra), astuple(rb)))


def _few_pairs(case, n=6):
    log, pairs = case["log"], case["pairs"]
    src, dst = pairs.src[:n], pairs.dst[:n]
    points = {int(i): log.points(int(i)) for i in np.union1d(src, dst)}
    return points, src, dst, [np.zeros((1, 3))] * n


def _cached_runs():
    from closurecheck.runners import dask_cluster as dask_runner

    return len(dask_runner._CACHES)


def test_a_bounded_cache_changes_nothing_but_the_work(case):
    log = case["log"]
    scans = [0, 3, 6, 9]
    # A cycle of pairs, one per batch: with room for two scans, whatever the
    # order, some scan must be prepared a second time.
    src = np.array([0, 3, 6, 9])
    dst = np.array([3, 6, 9, 0])
    points = {i: log.points(i) for i in scans}
    seeds = [np.zeros((1, 3))] * len(src)
    big, small = SerialRunner(), SerialRunner(cache_scans=2)
    a = big.register(points, src, dst, seeds, CONFIG.registration, 1)
    b = small.register(points, src, dst, seeds, CONFIG.registration, 1)
    assert big.last_builds == len(scans)
    assert small.last_builds > len(scans)
    assert all(r is not None for r in a)
    for ra, rb in zip(a, b):
        assert all(np.array_equal(x, y) for x, y in zip(astuple(ra), astuple(rb)))


def test_locality_order_groups_each_scans_pairs():
    # A route driven four times, L keyframes a pass; every keyframe is paired
    # with the same place on each earlier pass, listed by the newer scan (as
    # candidates are).  In that order a scan of the first pass has pairs
    # about L apart; in locality order they must form a short run.
    passes, length = 4, 200
    src, dst = [], []
    for q in range(1, passes):
        for i in range(length):
            for p in range(q):
                src.append(q * length + i)
                dst.append(p * length + i)
    src, dst = np.array(src), np.array(dst)
    by_newer = np.argsort(src, kind="stable")
    src, dst = src[by_newer], dst[by_newer]

    def widest_run(order):
        pos = np.empty(len(order), dtype=np.int64)
        pos[order] = np.arange(len(order))
        spans = []
        for scan in np.union1d(src, dst):
            at = pos[(src == scan) | (dst == scan)]
            spans.append(at.max() - at.min())
        return max(spans)

    order = locality_order(src, dst)
    assert sorted(order.tolist()) == list(range(len(src)))
    assert widest_run(np.arange(len(src))) >= length
    assert widest_run(order) <= 3 * passes * passes


def test_points_table_round_trip():
    rng = np.random.default_rng(0)
    points = {7: rng.normal(size=(5, 2)), 2: rng.normal(size=(3, 2)), 40: np.zeros((0, 2))}
    table = PointsTable.from_dict(points)
    for i, p in points.items():
        assert np.array_equal(table.get(i), p)
    assert table.get(3) is None and table.get(41) is None


def test_a_scan_without_straight_structure_is_skipped_not_fatal(case):
    rng = np.random.default_rng(1)
    # Scattered clutter: no point has collinear neighbours, so preparation on
    # straight structure alone refuses it (with small objects on, isolated
    # readings count as objects and it prepares).
    clutter = rng.uniform(-8.0, 8.0, size=(300, 2))
    options = dataclasses.replace(CONFIG.registration, point_features=False)
    with pytest.raises(InputError):
        prepare_scan(clutter, options)
    room = case["log"].points(0)
    cache = ScanCache(PointsTable.from_dict({0: clutter, 1: room, 2: room[:5]}), options)
    got = cache.get([0, 1, 2])
    assert set(got) == {1}
    out = register_batch(got, np.array([0, 1]), np.array([1, 2]), [np.zeros((1, 3))] * 2, options)
    assert out == [None, None]


def test_make_runner_choices():
    assert isinstance(make_runner(1), SerialRunner)
    with pytest.raises(InputError, match="^jobs must be >= 0"):
        make_runner(-1)


def test_missing_dask_gives_the_install_hint(monkeypatch):
    from closurecheck.runners.dask_cluster import MISSING_EXTRA

    monkeypatch.setitem(sys.modules, "distributed", None)  # import now raises ImportError
    with pytest.raises(InputError) as err:
        make_runner(2, dask="local")
    assert str(err.value) == MISSING_EXTRA == "running on Dask needs the optional extra: pip install 'closurecheck[dask]'"


def test_bad_dask_addresses_are_input_errors(monkeypatch):
    pytest.importorskip("distributed", reason="the optional extra closurecheck[dask] is not installed")
    import socket

    from closurecheck.runners import dask_cluster as dask_runner

    with pytest.raises(InputError, match="tcp://HOST:PORT"):
        dask_runner.DaskRunner("scheduler.example:8786")
    # A loopback port with nothing listening: refused, reported within the (shortened) timeout.
    monkeypatch.setattr(dask_runner, "CONNECT_TIMEOUT_S", 1.0)
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        port = s.getsockname()[1]
    with pytest.raises(InputError, match=f"cannot connect to the Dask scheduler at tcp://127.0.0.1:{port}") as err:
        dask_runner.DaskRunner(f"tcp://127.0.0.1:{port}")
    assert "\n" not in str(err.value)


def _two_stages(case):
    """The keyframes' points, and the two registration stages of a run on them: the calibration's
    keyframe steps without the coarse stage, then the candidates with it (seeds from odometry)."""
    log, pairs = case["log"], case["pairs"]
    kf = np.union1d(select_keyframes(log.odom, CONFIG.keyframes), np.union1d(pairs.src, pairs.dst))
    points = {int(i): log.points(int(i)) for i in kf}

    def seeds(src, dst):
        return [se2.between(log.odom[a], log.odom[b])[None] for a, b in zip(src, dst)]

    steps = (kf[:-1], kf[1:], seeds(kf[:-1], kf[1:]), dataclasses.replace(CONFIG.registration, coarse=False))
    cands = (pairs.src, pairs.dst, seeds(pairs.src, pairs.dst), CONFIG.registration)
    return points, steps, cands


def _same_fits(a, b):
    assert len(a) == len(b)
    for ra, rb in zip(a, b):
        assert (ra is None) == (rb is None)
        assert ra is None or all(np.array_equal(x, y, equal_nan=True) for x, y in zip(astuple(ra), astuple(rb)))


def test_the_candidates_reuse_the_scans_the_calibration_prepared(case):
    points, steps, cands = _two_stages(case)
    # Fresh: each stage prepares its scans itself, as every register call did before scans were held.
    fresh = SerialRunner(cache_scans=len(points))
    fresh_steps = fresh.register(points, *steps, CONFIG.batch_pairs)
    fresh_cands = fresh.register(points, *cands, CONFIG.batch_pairs)
    assert fresh.last_builds == len(np.union1d(cands[0], cands[1]))
    # Held, with room for every keyframe: the candidates prepare nothing, and get the same bits.
    runner = SerialRunner(cache_scans=len(points))
    with runner.hold(points, CONFIG.registration) as scans:
        held_steps = scans.register(*steps, CONFIG.batch_pairs)
        assert runner.last_builds == len(points)
        held_cands = scans.register(*cands, CONFIG.batch_pairs)
        assert runner.last_builds == 0
        assert scans.builds == len(points)
    assert scans.state is None  # released
    _same_fits(fresh_steps, held_steps)
    _same_fits(fresh_cands, held_cands)


def test_a_pool_holds_its_workers_and_their_scans_across_calls(case):
    points, steps, cands = _two_stages(case)
    reference = SerialRunner().register(points, *cands, CONFIG.batch_pairs)
    runner = PoolRunner(2)
    with runner.hold(points, CONFIG.registration) as scans:
        scans.register(*steps, CONFIG.batch_pairs)
        pool = scans.state
        workers = [set(ex._processes) for ex in pool.executors]
        first = runner.last_builds
        got = scans.register(*cands, CONFIG.batch_pairs)
        # The same worker processes.
        assert scans.state is pool and [set(ex._processes) for ex in pool.executors] == workers
        assert len(set().union(*workers)) == 2
        second = runner.last_builds
        assert scans.builds == first + second
    assert scans.state is None and all(ex._shutdown_thread for ex in pool.executors)  # released: shut down
    _same_fits(reference, got)
    # Each worker's cache (256 scans) holds every keyframe of this log, so over both calls a worker
    # prepares a scan at most once: the candidates found the calibration's scans in the workers.
    assert len(points) <= 256 and len(points) <= first <= 2 * len(points)
    assert first + second <= 2 * len(points)


def test_the_pipeline_holds_the_keyframes_from_the_calibration_to_the_candidates(case):
    calls = []

    class Recording(SerialRunner):
        def register(self, points, *args, **kwargs):
            out = super().register(points, *args, **kwargs)
            calls.append((points, self.last_builds))
            return out

    outcome = run_log(case["log"], CONFIG, external=case["pairs"], runner=Recording())
    (steps, calibration), (candidates, again) = calls
    assert steps is candidates and isinstance(steps, HeldScans) and steps.state is None  # one hold, released
    assert np.array_equal(steps.table.ids, outcome.keyframes)
    # This log's keyframes fit in the cache: the calibration prepared them all, the candidates none.
    assert len(outcome.keyframes) <= 256 and calibration == len(outcome.keyframes) and again == 0
    _assert_same_run(case["serial"], outcome)


def test_held_scans_refuse_what_they_cannot_serve(case):
    points, steps, cands = _two_stages(case)
    runner = SerialRunner()
    with runner.hold(points, CONFIG.registration) as scans:
        with pytest.raises(ValueError, match="prepare scans differently"):
            scans.register(*steps[:3], dataclasses.replace(CONFIG.registration, line_neighbours=12), 8)
        outside = max(points) + 1
        with pytest.raises(ValueError, match=rf"scans \[{outside}\] are not among the held scans"):
            scans.register(np.array([min(points)]), np.array([outside]), [np.zeros((1, 3))], CONFIG.registration, 8)


def test_regions_hand_out_every_batch_once_and_keep_each_workers_run_contiguous():
    for batches, workers in ((0, 2), (1, 3), (7, 2), (54, 2), (27, 4)):
        regions = Regions(batches, workers)
        own = [list(r) for r in regions.regions]
        assert [k for r in own for k in r] == list(range(batches))  # contiguous, in order
        assert max(map(len, own)) - min(map(len, own)) <= 1
        # Workers asking in turn, one of them twice as often: each starts on its own region, in order.
        asks = [0, 0] + list(range(workers)) * batches
        got = [(w, regions.next(w)) for w in asks]
        handed = [k for _, k in got if k is not None]
        assert sorted(handed) == list(range(batches))
        for w in range(workers):
            mine = [k for v, k in got if v == w and k is not None]
            from_own = [k for k in mine if k in own[w]]
            # Its own batches first, from the front of its region (the others take from the back).
            assert mine[:len(from_own)] == from_own == own[w][:len(from_own)]
            # Another's batch is taken from the back of the region with the most batches left.
            for k in mine[len(from_own):]:
                assert k not in own[w]
    # The region with the most left loses its last batch first.
    regions = Regions(10, 2)
    assert [regions.next(0) for _ in range(5)] == [0, 1, 2, 3, 4]
    assert regions.next(0) == 9 and regions.next(1) == 5 and regions.next(0) == 8


def test_scan_cache_bounds_and_dropped_grids_come_back_the_same(case):
    # Batches of overlapping scans, each target's grid searched as the coarse
    # stage would: at every step the cache holds at most max_scans scans
    # (the current batch excepted), only the grid_scans most recently used
    # hold a grid, and a scan whose grid was dropped gets the same grid back.
    log = case["log"]
    ids = list(range(0, 60, 3))
    options = CONFIG.registration
    cache = ScanCache(PointsTable.from_dict({i: log.points(i) for i in ids}), options, max_scans=7, grid_scans=3)
    first, owner, regrown = {}, {}, 0
    rng = np.random.default_rng(5)
    batches = [rng.choice(ids, size=rng.integers(1, 5), replace=False).tolist() for _ in range(60)]
    batches.append(ids[:9])  # larger than both bounds: none of its scans or grids is dropped while it runs
    used = []
    for batch in batches:
        with cache.lease(batch) as got:
            assert set(got) == set(batch)
            for i, scan in got.items():
                grid = scan.grid
                if i in first:
                    # The same prepared scan with a new grid: dropped by the grid tier alone.
                    regrown += owner[i] is scan and grid is not first[i]
                    assert grid.origin.tobytes() == first[i].origin.tobytes()
                    assert len(grid.levels) == len(first[i].levels)
                    assert all(a.dtype == b.dtype and a.tobytes() == b.tobytes()
                               for a, b in zip(grid.levels, first[i].levels))
                else:
                    first[i], owner[i] = grid, scan
            assert all("grid" in scan._lazy for scan in got.values())
        used = [i for i in used if i not in batch] + list(batch)
        kept = [i for i, scan in cache.prepared.items() if scan is not None]
        with_grid = [i for i in kept if "grid" in cache.prepared[i]._lazy]
        assert kept == used[-len(kept):] and len(kept) == min(len(used), max(7, len(batch)))
        assert with_grid == used[-len(with_grid):] and len(with_grid) == min(len(used), max(3, len(batch)))
    assert regrown > 0 and cache.grids_dropped > 0 and cache.builds > len(ids)
    # A fresh preparation of the scan gives the same grid as the rebuilt one.
    again = prepare_scan(log.points(ids[0]), options).grid
    assert all(a.tobytes() == b.tobytes() for a, b in zip(again.levels, first[ids[0]].levels))


def test_scan_cache_keeps_a_leased_grid_until_the_batch_ends(case):
    # A Dask worker runs batches in threads: another batch's fetch must not
    # drop a grid a running batch may still search (it would be rebuilt and
    # kept outside the grid tier); the grid goes when that batch ends.
    log = case["log"]
    cache = ScanCache(PointsTable.from_dict({i: log.points(i) for i in range(4)}), CONFIG.registration,
                      max_scans=4, grid_scans=1)
    with cache.lease([0]) as running:
        _ = running[0].grid
        with cache.lease([1]) as other:
            _ = other[1].grid
            assert "grid" in running[0]._lazy and list(cache.gridded) == [1]
        assert "grid" in other[1]._lazy  # still in the grid tier
        assert "grid" in running[0]._lazy
    assert "grid" not in cache.prepared[0]._lazy and "grid" in cache.prepared[1]._lazy
    assert list(cache.prepared) == [0, 1] and cache.grids_dropped == 1
