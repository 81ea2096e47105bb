"""The run's configuration: one frozen record of every stage's options, built from defaults, a TOML file and the command line.

``--config FILE`` loads a TOML file over the defaults, command-line options
go on top, and the effective configuration is written next to the outputs
so that a run can be reproduced with ``--config DIR/config.toml``
(docs/cli.md, "Settings").
"""

from __future__ import annotations

import dataclasses
import math
import typing
from dataclasses import dataclass

from .errors import InputError
from .frontend.candidates import CandidateOptions
from .frontend.descriptors import DescriptorOptions
from .frontend.keyframes import KeyframeOptions
from .registration.icp import RegistrationOptions
from .verification.verify import VerifyOptions


def _field_types(cls) -> dict:
    return typing.get_type_hints(cls)


def _coerce(value, typ, where: str, path):
    """Check a TOML value against a field's annotated type."""
    origin = typing.get_origin(typ)
    args = typing.get_args(typ)
    if origin is typing.Union or (origin is not None and str(origin) == "<class 'types.UnionType'>"):
        if value is None and type(None) in args:
            return None
        last = None
        for a in args:
            if a is type(None):
                continue
            try:
                return _coerce(value, a, where, path)
            except InputError as exc:
                last = exc
        raise last or InputError(f"{where}: unsupported value {value!r}", path)
    if origin is typing.Literal:
        if value not in args:
            raise InputError(f"{where}: must be one of {', '.join(map(repr, args))}, got {value!r}", path)
        return value
    if origin in (tuple, list):
        if not isinstance(value, (list, tuple)):
            raise InputError(f"{where}: expected a list, got {value!r}", path)
        inner = args[0] if args else float
        return tuple(_coerce(v, inner, where, path) for v in value)
    if typ is bool:
        if not isinstance(value, bool):
            raise InputError(f"{where}: expected true or false, got {value!r}", path)
        return value
    if typ is int:
        if isinstance(value, bool) or not isinstance(value, int):
            raise InputError(f"{where}: expected an integer, got {value!r}", path)
        return value
    if typ is float:
        if isinstance(value, bool) or not isinstance(value, (int, float)) or not math.isfinite(value):
            raise InputError(f"{where}: expected a finite number, got {value!r}", path)
        return float(value)
    if typ is str:
        if not isinstance(value, str):
            raise InputError(f"{where}: expected a string, got {value!r}", path)
        return value
    return value


def merge(obj, updates: dict, path=None, prefix: str = ""):
    """Return a copy of dataclass ``obj`` with ``updates`` (nested dicts) applied.

    Unknown keys and values of the wrong type raise :class:`InputError`.
    """
    if not isinstance(updates, dict):
        raise InputError(f"{prefix or 'config'}: expected a table", path)
    names = {f.name: f for f in dataclasses.fields(obj)}
    types = _field_types(type(obj))
    changes = {}
    for key, value in updates.items():
        where = f"{prefix}.{key}" if prefix else key
        if key not in names:
            known = ", ".join(sorted(names))
            raise InputError(f"unknown setting '{where}' (known here: {known})", path)
        current = getattr(obj, key)
        if dataclasses.is_dataclass(current):
            changes[key] = merge(current, value, path, where)
        else:
            changes[key] = _coerce(value, types[key], where, path)
    try:
        new = dataclasses.replace(obj, **changes)
    except (TypeError, ValueError) as exc:
        raise InputError(f"{prefix or 'config'}: {exc}", path) from None
    return new



@dataclass(frozen=True)
class OdometryOverrides:
    """Odometry noise model settings that override the log header's.

    None keeps the value from the log's ``odometry_noise`` header key, or the
    built-in default when the log has none (docs/formats.md).
    """

    translation_m_per_sqrt_m: float | None = None
    heading_rad_per_sqrt_m: float | None = None
    heading_rad_per_sqrt_rad: float | None = None


@dataclass(frozen=True)
class RunConfig:
    """Every setting of a run; one TOML table per stage (docs/cli.md, "Settings").

    jobs : worker processes for registration (0 = all cores, 1 = serial).
    batch_pairs : candidate pairs per unit of parallel work.
    max_pairs : most candidate pairs a run registers (a pairs file and
        proposals together); more are refused with exit status 2 before
        any registration.  The default, 200,000, is about half an hour of
        registration with two workers at the 100-odd pairs per second of
        docs/performance.md ("Whole runs and parallel registration"); a
        million pairs would take hours.
    """

    jobs: int = 0
    batch_pairs: int = 64
    max_pairs: int = 200_000
    keyframes: KeyframeOptions = KeyframeOptions()
    odometry: OdometryOverrides = OdometryOverrides()
    descriptors: DescriptorOptions = DescriptorOptions()
    candidates: CandidateOptions = CandidateOptions()
    # Candidates arrive with guesses good to a metre or so (odometry shrunk
    # towards "same place", descriptor yaw), so the coarse search needs a
    # smaller window than registration's own default for arbitrary pairs;
    # a third of the area costs a third of the time.  A fixed 0.01 rad
    # angle step keeps long-range scans (30 m) from multiplying the angles
    # searched; ICP refines the angle anyway.
    registration: RegistrationOptions = RegistrationOptions(coarse_window_m=2.0, coarse_window_rad=0.6,
                                                            coarse_angle_step_rad=0.01)
    verify: VerifyOptions = VerifyOptions()

    def __post_init__(self):
        if self.jobs < 0:
            raise InputError(f"jobs must be >= 0 (0 = all cores), got {self.jobs}")
        if self.batch_pairs < 1:
            raise InputError(f"batch_pairs must be >= 1, got {self.batch_pairs}")
        if self.max_pairs < 1:
            raise InputError(f"max_pairs must be >= 1, got {self.max_pairs}")
