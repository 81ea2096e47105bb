"""The warm-up scene and the fork server's head start (registration/warm.py, runners/pool.py)."""

import subprocess
import sys

import numpy as np

from closurecheck.registration.warm import _POST, _ROOM, room_scan


def test_room_scan_points_lie_on_the_walls_or_the_post():
    # Plain geometry: a reading in the world frame is on one of the four wall lines or on the
    # post's circle, and nothing is nearer than what it hit along its beam.
    pose = (0.3, 0.1, 0.05)
    pts = room_scan(pose)
    c, s = np.cos(pose[2]), np.sin(pose[2])
    wx = pose[0] + c * pts[:, 0] - s * pts[:, 1]
    wy = pose[1] + s * pts[:, 0] + c * pts[:, 1]
    x0, x1, y0, y1 = _ROOM
    px, py, radius = _POST
    on_wall = np.minimum.reduce([abs(wx - x0), abs(wx - x1), abs(wy - y0), abs(wy - y1)]) < 1e-9
    on_post = abs(np.hypot(wx - px, wy - py) - radius) < 1e-9
    assert np.all(on_wall | on_post)
    assert 5 <= on_post.sum() < 40          # the post is seen, as a small object
    assert np.all((wx >= x0 - 1e-9) & (wx <= x1 + 1e-9) & (wy >= y0 - 1e-9) & (wy <= y1 + 1e-9))


def _fresh(code: str) -> str:
    return subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True,
                          timeout=300).stdout.strip()


def test_a_new_process_has_no_kernel_loaded_and_warm_kernels_loads_those_icp_uses():
    out = _fresh("from closurecheck.registration.warm import loaded_kernels, warm_kernels\n"
                 "print(len(loaded_kernels()))\n"
                 "warm_kernels()\n"
                 "print(' '.join(loaded_kernels()))")
    before, after = out.splitlines()
    assert before == "0"
    assert {"icp_line", "coarse_search", "line_models", "neighbourhood_sums", "small_objects", "cell_index",
            "associate", "linearise"} <= set(after.split())


def test_pool_workers_start_with_the_kernels_loaded():
    # A worker forked from the pool's fork server reports what it has loaded before any batch.
    out = _fresh("from closurecheck.runners.pool import PoolRunner\n"
                 "from closurecheck.registration.warm import loaded_kernels\n"
                 "runner = PoolRunner(2)\n"
                 "with runner._context.Pool(1) as pool:\n"
                 "    print(' '.join(pool.apply(loaded_kernels)))")
    assert {"icp_line", "coarse_search", "line_models"} <= set(out.split())


def test_the_pool_modules_import_without_the_rest_of_the_package():
    # What the fork server imports before it can fork a worker: registration and the runners, not
    # scipy.stats, scipy.optimize or scikit-learn (about 1.4 s of the package's 2 s import).
    out = _fresh("import sys, closurecheck.runners._forkserver_child, closurecheck.runners.pool\n"
                 "print(sorted(m for m in ('scipy.stats', 'scipy.optimize', 'sklearn', 'matplotlib',"
                 " 'closurecheck.pipeline') if m in sys.modules))")
    assert out == "[]"


def test_every_public_name_resolves():
    import closurecheck

    for name in closurecheck.__all__:
        assert getattr(closurecheck, name) is not None
    assert set(closurecheck.__all__) <= set(dir(closurecheck))
