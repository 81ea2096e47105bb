"""closurecheck: verified loop closures and calibrated pose graphs from 2D LiDAR scan logs."""

from ._version import __version__
from .errors import InputError
from .io.scanlog import ScanLog, Sensor, read_scanlog, scan_points, write_scanlog
from .registration.icp import Registration, RegistrationOptions, register

__all__ = ["InputError", "ScanLog", "Sensor", "read_scanlog", "write_scanlog", "scan_points", "__version__",
           "register", "Registration", "RegistrationOptions"]
