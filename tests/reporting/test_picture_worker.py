"""The report's second process (closurecheck.reporting.picture_worker).

The pictures it draws must be the bytes the main process draws itself, a
report built with it must be the report built without it, and a worker that
fails must cost nothing but time: the main process draws its pictures.  The
PNGs are compared byte for byte (same code, same matplotlib, both
deterministic) and checked against the PNG signature (PNG specification,
W3C / ISO/IEC 15948, section 5.2).
"""

from __future__ import annotations

import subprocess
import sys

import pytest
from test_report import PNG_MAGIC, _data

from closurecheck.reporting import picture_worker
from closurecheck.reporting.picture_worker import PictureJob, start_pictures, worth_a_worker
from closurecheck.reporting.report import PICTURES, build_report, draw_picture


def _tree(folder):
    return {p.relative_to(folder).as_posix(): p.read_bytes() for p in sorted(folder.rglob("*")) if p.is_file()}


def test_worker_pictures_are_the_main_process_pictures():
    data = _data()
    names = tuple(name for name, _ in PICTURES)
    with start_pictures(data, names) as job:
        got = job.result()
    assert got is not None and set(got) == set(names)
    for name in names:
        here = draw_picture(name, data)
        assert got[name] == here, name
        if here is not None:
            assert here.startswith(PNG_MAGIC)


def test_report_with_a_worker_is_the_report_without(tmp_path):
    data = _data()
    build_report(tmp_path / "alone", data)
    with start_pictures(data) as job:
        build_report(tmp_path / "shared", data, pictures=job)
    alone, shared = _tree(tmp_path / "alone"), _tree(tmp_path / "shared")
    assert "figures/map.png" in alone and "figures/truth.png" in alone
    assert alone == shared


class _Steps:
    def __init__(self):
        self.lines = []

    def step(self, text):
        self.lines.append(text)


def test_a_failed_worker_leaves_the_pictures_to_the_main_process(tmp_path):
    data = _data()
    build_report(tmp_path / "alone", data)
    # A "worker" that exits at once with an error and writes nothing.
    proc = subprocess.Popen([sys.executable, "-c", "import sys; sys.exit(1)"], stdin=subprocess.PIPE,
                            stdout=subprocess.PIPE)
    steps = _Steps()
    with PictureJob(proc, picture_worker.WORKER_PICTURES) as job:
        build_report(tmp_path / "fallback", data, pictures=job, progress=steps)
    assert _tree(tmp_path / "fallback") == _tree(tmp_path / "alone")
    # Told once as the second process' and again when drawn here.
    assert "report: maps (second process)" in steps.lines and "report: maps" in steps.lines


def test_every_picture_is_told_with_a_worker(tmp_path):
    steps = _Steps()
    with start_pictures(_data()) as job:
        build_report(tmp_path, _data(), pictures=job, progress=steps)
    for text in ("maps", "loop closures", "check figures", "ground truth and scores", "page"):
        assert any(line.startswith(f"report: {text}") for line in steps.lines), (text, steps.lines)


def test_closing_a_job_ends_its_worker():
    with start_pictures(_data()) as job:
        pass
    assert job.proc.poll() is not None


def test_one_job_means_one_process():
    assert worth_a_worker(1) is False


@pytest.mark.parametrize("cores, busy, expected", [(1, 0.0, False), (2, 0.0, True), (2, 1.0, False),
                                                   (4, 2.0, True), (4, 3.0, False)])
def test_a_worker_only_where_a_core_is_idle(monkeypatch, cores, busy, expected):
    import os

    monkeypatch.setattr(os, "sched_getaffinity", lambda pid: set(range(cores)), raising=False)
    monkeypatch.setattr(picture_worker, "busy_elsewhere", lambda: busy)
    assert worth_a_worker(0) is expected
    assert worth_a_worker(2) is expected


def test_busy_elsewhere_is_a_count():
    busy = picture_worker.busy_elsewhere()
    assert busy >= 0 and busy == int(busy)


def test_warm_workers_draw_their_pictures_as_the_main_process(tmp_path):
    # Started ahead (launch(warm=True)), one per group, given the data later: the same report.
    data = _data()
    build_report(tmp_path / "alone", data)
    groups = picture_worker.WARM_GROUPS + (("checks",),)
    assert sorted(name for group in groups for name in group) == sorted(name for name, _ in PICTURES)
    jobs = [picture_worker.launch(names, warm=True) for names in groups]
    try:
        for job in jobs:
            job.send(data)
        build_report(tmp_path / "warm", data, pictures=jobs)
    finally:
        for job in jobs:
            job.close()
    assert [job.proc.returncode for job in jobs] == [0] * len(groups)
    assert _tree(tmp_path / "warm") == _tree(tmp_path / "alone")


def test_one_failed_worker_of_two_leaves_its_pictures_to_the_main_process(tmp_path):
    data = _data()
    build_report(tmp_path / "alone", data)
    good = picture_worker.launch(("map", "loops"), warm=True)
    bad = PictureJob(subprocess.Popen([sys.executable, "-c", "import sys; sys.exit(1)"], stdin=subprocess.PIPE,
                                      stdout=subprocess.PIPE), ("checks", "nees"))
    with good, bad:
        good.send(data)
        bad.send(data)
        build_report(tmp_path / "fallback", data, pictures=[good, bad])
    assert _tree(tmp_path / "fallback") == _tree(tmp_path / "alone")


def test_a_warm_worker_never_given_data_ends_with_its_job():
    with picture_worker.launch(warm=True) as job:
        pass
    assert job.proc.poll() is not None and job.result() is None


def test_a_run_starts_its_worker_after_registering_and_draws_the_same_pictures(tmp_path, monkeypatch):
    # run_one starts the worker from run_log's before_verification hook: once the candidates are
    # registered, before the verification, and hands it the report's data at the write.
    from closurecheck import pipeline
    from closurecheck.config import RunConfig
    from closurecheck.io.scanlog import write_scanlog
    from closurecheck.simulation.simulate import simulate_log

    log_path = tmp_path / "ring.jsonl"
    write_scanlog(log_path, simulate_log("ring", seed=4, scans=120))
    stages, started = [], []

    class Progress:
        def stage(self, name):
            stages.append(name)

        def __getattr__(self, name):
            return lambda *args, **kwargs: None

    jobs = []

    def launch(*args, **kwargs):
        started.append(list(stages))
        jobs.append(picture_worker.launch(*args, **kwargs))
        return jobs[-1]

    monkeypatch.setattr(pipeline, "launch", launch)
    monkeypatch.setattr(pipeline, "worth_a_worker", lambda jobs: True)
    pipeline.run_one(log_path, tmp_path / "warm", RunConfig(jobs=1), progress=Progress())
    assert len(started) == len(picture_worker.WARM_GROUPS)
    assert all("registration" in seen and "verification" not in seen for seen in started)
    # Each was handed the data and drew (a job never used is killed).
    assert [job.proc.returncode for job in jobs] == [0] * len(jobs)
    monkeypatch.setattr(pipeline, "worth_a_worker", lambda jobs: False)
    monkeypatch.setattr(picture_worker, "worth_a_worker", lambda jobs: False)
    pipeline.run_one(log_path, tmp_path / "alone", RunConfig(jobs=1))
    assert len(started) == len(picture_worker.WARM_GROUPS)
    warm, alone = _tree(tmp_path / "warm" / "figures"), _tree(tmp_path / "alone" / "figures")
    assert "map.png" in alone and warm == alone


def test_the_worker_gets_only_the_points_the_maps_draw():
    # The points are most of the data a worker is sent: cut to the maps' stride, the same map.
    from closurecheck.reporting.report import map_points_only

    data = _data()
    cut = map_points_only(data)
    assert data.map_stride > 1 and cut.map_stride == 1
    assert sum(len(p) for p in cut.scan_points) < sum(len(p) for p in data.scan_points)
    assert draw_picture("map", cut) == draw_picture("map", data)
