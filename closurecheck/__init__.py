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

from ._version import __version__
from .config import RunConfig, build_config
from .errors import InputError
from .io.graph_file import PoseGraph, read_graph
from .io.scanlog import ScanLog, Sensor, read_scanlog, scan_points, write_scanlog
from .pipeline import run
from .registration.icp import Registration, RegistrationOptions, register
from .simulation.simulate import simulate_log

__all__ = ["__version__", "run", "RunConfig", "build_config", "InputError", "ScanLog", "Sensor", "read_scanlog",
           "write_scanlog", "scan_points", "PoseGraph", "read_graph", "register", "Registration",
           "RegistrationOptions", "simulate_log"]
