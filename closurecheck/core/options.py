"""Options records: each setting declares its type and constraints once, and is checked when the record is built.

Every stage keeps its thresholds in a frozen dataclass of named settings
(``VerifyOptions``, ``RegistrationOptions``, ...).  A setting's type comes
from its annotation; its range or choices come from :func:`setting`.  The
:func:`options` decorator makes the class a frozen dataclass whose
construction checks every field, so a bad value fails where the
configuration is built (before any scan is read), never deep inside a
stage; the functions that take the record then trust it.

A failed check raises :class:`OptionError` (an ``InputError``, exit status
2) that names the setting, what it must be and the value given (shortened);
:func:`closurecheck.config.build_config` adds the TOML table and file.

Examples
--------
>>> from closurecheck.core.options import options, setting
>>> @options
... class ToyOptions:
...     radius_m: float = setting(1.0, above=0.0)
...     mode: str = setting("fast", choices=("fast", "exact"))
>>> ToyOptions(radius_m=2.5).radius_m
2.5
>>> ToyOptions(mode="slow")
Traceback (most recent call last):
...
closurecheck.core.options.OptionError: mode: must be one of 'fast', 'exact' (got 'slow')
"""

from __future__ import annotations

import dataclasses
import math
import numbers
import typing
from dataclasses import dataclass

from ..errors import InputError, shorten

_RULE = "closurecheck.rule"


@dataclass(frozen=True)
class Rule:
    """Constraints of one setting beyond its type.

    at_least / above : inclusive / exclusive lower bound.
    at_most / below : inclusive / exclusive upper bound.
    choices : the allowed values (strings, usually).
    allow_inf : floats may be +inf (a bound that disables a check).
    """

    at_least: float | None = None
    above: float | None = None
    at_most: float | None = None
    below: float | None = None
    choices: tuple | None = None
    allow_inf: bool = False

    def problem(self, value) -> str | None:
        """What is wrong with ``value`` under this rule, or None."""
        if self.choices is not None:
            if value not in self.choices:
                return "must be one of " + ", ".join(repr(c) for c in self.choices)
            return None
        if isinstance(value, str) or value is None:
            return None
        if self.at_least is not None and not value >= self.at_least:
            return f"must be >= {self.at_least:g}"
        if self.above is not None and not value > self.above:
            return f"must be > {self.above:g}"
        if self.at_most is not None and not value <= self.at_most:
            return f"must be <= {self.at_most:g}"
        if self.below is not None and not value < self.below:
            return f"must be < {self.below:g}"
        return None


class OptionError(InputError):
    """A setting with a value outside what it declares; ``option`` is the setting's name."""

    def __init__(self, option: str, problem: str, value=dataclasses.MISSING):
        self.option = option
        self.reason = problem if value is dataclasses.MISSING else f"{problem} (got {shorten(value)})"
        super().__init__(f"{option}: {self.reason}")


def setting(default, *, at_least=None, above=None, at_most=None, below=None, choices=None, allow_inf=False):
    """A dataclass field with a default and the constraints :func:`options` checks.

    Parameters
    ----------
    default : the default value (checked like any other).
    at_least, above, at_most, below : numeric bounds (inclusive, exclusive).
    choices : iterable of allowed values.
    allow_inf : a float setting may be ``inf``.

    Examples
    --------
    >>> from closurecheck.core.options import options, setting
    >>> @options
    ... class Gate:
    ...     probability: float = setting(0.99, above=0.0, below=1.0)
    >>> Gate(probability=1.5)
    Traceback (most recent call last):
    ...
    closurecheck.core.options.OptionError: probability: must be < 1 (got 1.5)
    """
    rule = Rule(at_least=at_least, above=above, at_most=at_most, below=below,
                choices=None if choices is None else tuple(choices), allow_inf=allow_inf)
    if isinstance(default, (list, dict, set)):
        raise TypeError("mutable defaults are not allowed in options records")
    return dataclasses.field(default=default, metadata={_RULE: rule})


def _is_int(v) -> bool:
    return isinstance(v, numbers.Integral) and not isinstance(v, bool)


def _is_real(v) -> bool:
    return isinstance(v, numbers.Real) and not isinstance(v, bool)


def _type_problem(value, typ, rule: Rule) -> str | None:
    """What is wrong with the type of ``value`` for annotation ``typ``, or None."""
    origin = typing.get_origin(typ)
    args = typing.get_args(typ)
    if origin is typing.Union or type(typ).__name__ == "UnionType":
        if value is None and type(None) in args:
            return None
        inner = [a for a in args if a is not type(None)]
        problems = [_type_problem(value, a, rule) for a in inner]
        if any(p is None for p in problems):
            return None
        return problems[0] + (" or nothing" if type(None) in args else "")
    if origin is typing.Literal:
        return None if value in args else "must be one of " + ", ".join(map(repr, args))
    if origin in (tuple, list):
        return None if isinstance(value, tuple) else "must be a list"
    if typ is bool:
        return None if isinstance(value, bool) else "must be true or false"
    if typ is int:
        return None if _is_int(value) else "must be an integer"
    if typ is float:
        if not _is_real(value):
            return "must be a number"
        try:
            v = float(value)
        except OverflowError:  # an integer of hundreds of digits
            return "must be a finite number"
        if math.isnan(v) or (math.isinf(v) and not rule.allow_inf):
            return "must be a finite number"
        return None
    if typ is str:
        return None if isinstance(value, str) else "must be a string"
    if dataclasses.is_dataclass(typ):
        return None if isinstance(value, typ) else f"must be a {typ.__name__} record"
    return None


_HINTS: dict = {}


def _hints(cls) -> dict:
    hints = _HINTS.get(cls)
    if hints is None:
        hints = _HINTS[cls] = typing.get_type_hints(cls)
    return hints


def check(record) -> None:
    """Check every field of an options record against its annotation and :func:`setting` rule.

    Raises :class:`OptionError` naming the first setting that fails.
    """
    hints = _hints(type(record))
    for f in dataclasses.fields(record):
        value = getattr(record, f.name)
        rule = f.metadata.get(_RULE, Rule())
        problem = _type_problem(value, hints[f.name], rule) or rule.problem(value)
        if problem:
            raise OptionError(f.name, problem, value)


def fail(option: str, problem: str) -> typing.NoReturn:
    """Raise the :class:`OptionError` of a constraint between several settings."""
    raise OptionError(option, problem)


def options(cls=None, *, eq: bool = True):
    """Class decorator: a frozen dataclass whose every construction runs :func:`check`.

    A ``__post_init__`` of the class itself runs after the per-field checks,
    for constraints between fields (raise with :func:`fail`).
    """

    def wrap(c):
        own = c.__dict__.get("__post_init__")

        def __post_init__(self):
            check(self)
            if own is not None:
                own(self)

        c.__post_init__ = __post_init__
        return dataclass(frozen=True, eq=eq)(c)

    return wrap if cls is None else wrap(cls)


def is_options(obj) -> bool:
    """Whether ``obj`` is an options record (a dataclass instance)."""
    return dataclasses.is_dataclass(obj) and not isinstance(obj, type)


def _as_declared(value, typ):
    """A value from a settings file in the form its annotation declares: ints for floats, lists as tuples."""
    origin = typing.get_origin(typ)
    if origin is typing.Union or type(typ).__name__ == "UnionType":
        for a in typing.get_args(typ):
            if a is not type(None) and _type_problem(value, a, Rule(allow_inf=True)) is None:
                return _as_declared(value, a)
        return value
    if typ is float and _is_real(value):
        try:
            return float(value)
        except OverflowError:
            return value  # refused by the check, with the setting named
    if origin in (tuple, list) and isinstance(value, list):
        inner = (typing.get_args(typ) or (float,))[0]
        return tuple(_as_declared(v, inner) for v in value)
    return value


def updated(record, changes: dict, prefix: str = ""):
    """A copy of options record ``record`` with ``changes`` (nested dicts for nested records) applied.

    Values are converted to the declared form (a TOML integer for a float
    setting, a list for a tuple) and checked like any construction.  Unknown
    names and bad values raise :class:`OptionError` whose ``option`` is the
    dotted name (``verify.kernel``).

    Examples
    --------
    >>> from closurecheck.core.options import options, setting, updated
    >>> @options
    ... class Inner:
    ...     step_m: float = setting(0.5, above=0.0)
    >>> updated(Inner(), {"step_m": 2}).step_m
    2.0
    >>> updated(Inner(), {"stride": 2})
    Traceback (most recent call last):
    ...
    closurecheck.core.options.OptionError: stride: unknown setting (known here: step_m)
    """
    if not isinstance(changes, dict):
        raise OptionError(prefix or "settings", "must be a table of settings")
    names = {f.name for f in dataclasses.fields(record)}
    hints = _hints(type(record))
    values = {}
    for key, value in changes.items():
        where = f"{prefix}.{key}" if prefix else str(key)
        if key not in names:
            raise OptionError(where, f"unknown setting (known here: {', '.join(sorted(names))})")
        current = getattr(record, key)
        if is_options(current):
            values[key] = updated(current, value, where)
        else:
            values[key] = _as_declared(value, hints[key])
    try:
        return dataclasses.replace(record, **values)
    except OptionError as exc:
        raise OptionError(f"{prefix}.{exc.option}" if prefix else exc.option, exc.reason) from None
