"""closurecheck: verified loop closures and calibrated pose graphs from 2D LiDAR scan logs.

The Python API (docs/api.md walks through it):

========================================  ====================================================
:func:`run`                               the whole job: keyframes, candidates, registration,
                                          verification, graph; writes the outputs to a folder
:func:`register`                          one pair of scans: point-to-line ICP with a covariance
:func:`read_scanlog`, :func:`write_scanlog`  the scan-log format (docs/formats.md)
:func:`read_graph`                        load a run's graph.json back
:func:`build_config`                      settings from defaults, a TOML file and overrides
:func:`simulate_log`                      a log of one of our invented scenarios, with truth
:class:`InputError`                       the one error for bad input (one line, exit status 2)
========================================  ====================================================

The stages live in sub-packages, one each (docs/architecture.md): ``io``,
``core``, ``frontend``, ``registration``, ``runners``, ``graph``,
``verification``, ``simulation``, ``reporting``.

Examples
--------
>>> import closurecheck
>>> log = closurecheck.simulate_log("ring", seed=4, scans=60)
>>> a, b = log.points(10), log.points(11)
>>> res = closurecheck.register(b, a)
>>> bool(res.converged), res.delta.shape, res.covariance.shape
(True, (3,), (3, 3))
"""

import importlib

from ._version import __version__
from .errors import InputError

# Each public name and the module that defines it, imported on first use (PEP 562): the whole
# package takes about 1.1 s to import (scipy.optimize, scipy.sparse, numba and the kernels), while a
# pool worker needs only registration (about 0.5 s), and the pool's fork server imports this package
# before it can start one (runners/pool.py).
_HOMES = {
    "run": ".pipeline",
    "RunConfig": ".config",
    "build_config": ".config",
    "PoseGraph": ".io.graph_file",
    "read_graph": ".io.graph_file",
    "ScanLog": ".io.scanlog",
    "Sensor": ".io.scanlog",
    "read_scanlog": ".io.scanlog",
    "scan_points": ".io.scanlog",
    "write_scanlog": ".io.scanlog",
    "Registration": ".registration.icp",
    "RegistrationOptions": ".registration.icp",
    "register": ".registration.icp",
    "simulate_log": ".simulation.simulate",
}

__all__ = ["__version__", "run", "RunConfig", "build_config", "InputError", "ScanLog", "Sensor", "read_scanlog",
           "write_scanlog", "scan_points", "PoseGraph", "read_graph", "register", "Registration",
           "RegistrationOptions", "simulate_log"]


def __getattr__(name: str):
    home = _HOMES.get(name)
    if home is None:
        raise AttributeError(f"module {__name__!r} has no attribute {name!r}")
    value = getattr(importlib.import_module(home, __name__), name)
    globals()[name] = value
    return value


def __dir__() -> list[str]:
    return sorted(set(globals()) | set(_HOMES))
