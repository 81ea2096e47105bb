"""The options toolbox: declared types and bounds are enforced at construction, with one-line errors."""

import math

import pytest

from closurecheck.core.options import OptionError, fail, options, setting, updated
from closurecheck.errors import InputError


@options
class Sample:
    radius_m: float = setting(1.0, above=0.0)
    share: float = setting(0.5, at_least=0.0, at_most=1.0)
    count: int = setting(3, at_least=1)
    limit_m: float = setting(math.inf, above=0.0, allow_inf=True)
    budget_s: float | None = setting(None, above=0.0)
    mode: str = setting("a", choices=("a", "b"))
    enabled: bool = setting(True)

    def __post_init__(self):
        if self.count > 10 and self.mode == "a":
            fail("count", "must be <= 10 in mode 'a'")


@pytest.mark.parametrize("kwargs,words", [
    ({"radius_m": 0.0}, "radius_m: must be > 0"),
    ({"radius_m": math.nan}, "radius_m: must be a finite number"),
    ({"radius_m": math.inf}, "radius_m: must be a finite number"),
    ({"radius_m": "1"}, "radius_m: must be a number"),
    ({"radius_m": True}, "radius_m: must be a number"),
    ({"share": 1.5}, "share: must be <= 1"),
    ({"count": 2.0}, "count: must be an integer"),
    ({"count": 0}, "count: must be >= 1"),
    ({"budget_s": -1.0}, "budget_s: must be > 0"),
    ({"mode": "c"}, "mode: must be one of 'a', 'b'"),
    ({"enabled": 1}, "enabled: must be true or false"),
    ({"count": 11}, "count: must be <= 10 in mode 'a'"),
])
def test_bad_values_are_refused_at_construction(kwargs, words):
    with pytest.raises(OptionError, match=words) as err:
        Sample(**kwargs)
    assert isinstance(err.value, InputError)
    assert "\n" not in str(err.value)


def test_good_values_pass_and_records_stay_frozen():
    s = Sample(radius_m=2, limit_m=math.inf, budget_s=3.0, count=11, mode="b")
    assert s.radius_m == 2 and s.limit_m == math.inf
    with pytest.raises(AttributeError):
        s.radius_m = 3.0


def test_updated_converts_file_values_and_names_the_dotted_setting():
    @options
    class Outer:
        inner: Sample = Sample()
        seed: int = setting(0, at_least=0)

    new = updated(Outer(), {"seed": 2, "inner": {"radius_m": 4, "mode": "b"}})
    assert new.inner.radius_m == 4.0 and isinstance(new.inner.radius_m, float) and new.seed == 2
    with pytest.raises(OptionError, match=r"^inner.share: must be <= 1 \(got 3.0\)$"):
        updated(Outer(), {"inner": {"share": 3}})
    with pytest.raises(OptionError, match="inner.nope: unknown setting"):
        updated(Outer(), {"inner": {"nope": 1}})
    with pytest.raises(OptionError, match="inner: must be a table"):
        updated(Outer(), {"inner": 5})
