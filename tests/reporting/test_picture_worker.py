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
