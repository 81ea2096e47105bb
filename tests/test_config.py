"""TOML configuration: merge rules, errors and the round trip of the effective config."""

import dataclasses

import pytest

from closurecheck.config import merge
from closurecheck.errors import InputError
from closurecheck.io.settings_file import load_toml, to_toml


@dataclasses.dataclass(frozen=True)
class Inner:
    max_correspondence_m: float = 0.5
    iterations: int = 30
    kernel: str = "cauchy"
    enabled: bool = True
    window_m: tuple[float, ...] = (1.0, 2.0)
    budget_s: float | None = None


@dataclasses.dataclass(frozen=True)
class Outer:
    seed: int = 0
    inner: Inner = Inner()


def test_round_trip_through_toml(tmp_path):
    cfg = merge(Outer(), {"seed": 3, "inner": {"max_correspondence_m": 0.25, "kernel": "huber",
                                               "window_m": [0.5], "budget_s": 2}})
    path = tmp_path / "c.toml"
    path.write_text(to_toml(cfg, header="effective configuration"))
    again = merge(Outer(), load_toml(path))
    assert again == cfg
    assert again.inner.budget_s == 2.0 and isinstance(again.inner.budget_s, float)


@pytest.mark.parametrize("updates,words", [
    ({"nope": 1}, "unknown setting 'nope'"),
    ({"inner": {"iterations": 2.5}}, "inner.iterations: expected an integer"),
    ({"inner": {"enabled": 1}}, "true or false"),
    ({"inner": {"max_correspondence_m": "far"}}, "finite number"),
    ({"inner": 3}, "expected a table"),
])
def test_bad_settings_are_one_line_input_errors(updates, words):
    with pytest.raises(InputError, match=words):
        merge(Outer(), updates, path="run.toml")


def test_toml_syntax_error_names_the_file(tmp_path):
    path = tmp_path / "bad.toml"
    path.write_text("[inner\nx = 1\n")
    with pytest.raises(InputError, match="bad.toml: not valid TOML"):
        load_toml(path)
