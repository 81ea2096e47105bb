"""closurecheck: verified loop closures and calibrated pose graphs from 2D LiDAR scan logs."""

from .errors import InputError
from .registration import Registration, RegistrationOptions, register
from .scanlog import ScanLog, Sensor, read_scanlog, scan_points, write_scanlog

__version__ = "0.1.0"

__all__ = ["InputError", "ScanLog", "Sensor", "read_scanlog", "write_scanlog", "scan_points", "__version__",
           "register", "Registration", "RegistrationOptions"]
