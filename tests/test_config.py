"""The run's configuration: TOML round trip, and every options table refusing a bad value before any scan is read."""

import dataclasses

import pytest

from closurecheck import cli
from closurecheck.config import RunConfig, build_config
from closurecheck.core.options import is_options
from closurecheck.errors import InputError
from closurecheck.io.settings_file import load_toml, to_toml


def test_round_trip_through_toml(tmp_path):
    cfg = build_config(updates={"jobs": 3, "verify": {"min_overlap": 0.25, "kernel": "huber"},
                                "odometry": {"translation_m_per_sqrt_m": 2}})
    path = tmp_path / "c.toml"
    path.write_text(to_toml(cfg, header="effective configuration"))
    again = build_config(path)
    assert again == cfg
    assert again.odometry.translation_m_per_sqrt_m == 2.0
    assert isinstance(again.odometry.translation_m_per_sqrt_m, float)


def test_reviewer_decisions_round_trip_with_any_note(tmp_path):
    # Notes are free text: quotes, backslashes, newlines and control characters
    # must come back as written (TOML 1.0 basic strings, "String").
    notes = ['plain', 'a "quoted" word, a comma', 'back\\slash', 'two\nlines\tand tab', 'bell\x07 del\x7f', 'ünïcødé ✓']
    rows = [[10 * k + 1, 10 * k + 2, "accept" if k % 2 else "reject", n] for k, n in enumerate(notes)]
    cfg = build_config(updates={"review": {"decisions": rows, "decisions_file": "C:\\sites\\north.csv"}})
    path = tmp_path / "c.toml"
    path.write_text(to_toml(cfg), encoding="utf-8")
    again = build_config(path)
    assert again == cfg
    assert [r[3] for r in again.review.decisions] == notes
    assert again.review.decisions_file == "C:\\sites\\north.csv"


def test_every_table_of_the_configuration_is_an_options_record():
    tables = [f.name for f in dataclasses.fields(RunConfig) if is_options(getattr(RunConfig(), f.name))]
    assert set(tables) == {"keyframes", "odometry", "calibration", "descriptors", "candidates", "registration",
                           "verify", "trust", "review"}


# One bad value per table (and the top level): each is refused when the
# configuration is built, naming the setting and the file.
BAD = [
    ("jobs = -1", "jobs: must be >= 0"),
    ("batch_pairs = 0", "batch_pairs: must be >= 1"),
    ("[keyframes]\nspacing_m = 0.0", "keyframes.spacing_m: must be > 0"),
    ("[odometry]\nheading_rad_per_sqrt_m = -0.1", "odometry.heading_rad_per_sqrt_m: must be >= 0"),
    ("[calibration]\nmin_steps = 2", "calibration.min_steps: must be >= 5"),
    ("[descriptors]\nrings = 0", "descriptors.rings: must be >= 1"),
    ("[candidates]\ntree = \"forest\"", "candidates.tree: must be one of 'kd_tree', 'ball_tree'"),
    ("[registration]\nkernel = \"nonsense\"", "registration.kernel: must be one of"),
    ("[verify]\nkernel = \"nonsense\"", "verify.kernel: must be one of"),
    ("[verify]\nmap_rounds = -1", "verify.map_rounds: must be >= 0"),
    ("[verify]\nmin_overlap = 7", "verify.min_overlap: must be <= 1"),
    ("[verify]\nmin_overlap = -1.0", "verify.min_overlap: must be >= 0"),
    ("[verify]\nmap_probability = -2.0", "verify.map_probability: must be > 0"),
    ("[verify]\ngate_probability = 1.5", "verify.gate_probability: must be < 1"),
    ("[verify]\nuse_gnc = 1", "verify.use_gnc: must be true or false"),
    ("[verify]\nclique_max_expansions = 2.5", "verify.clique_max_expansions: must be an integer"),
    ("[verify]\nnope = 1", "verify.nope: unknown setting"),
    ("[verify]\nrival_margin = 0.5", "verify.rival_margin: must be >= 1"),
    ("[verify]\nclique_max_odometry_factor = 0.5", "verify.clique_max_odometry_factor: must be >= 1"),
    ("[verify]\npair_window_m = -5.0", "verify.pair_window_m: must be > 0"),
    ("[verify]\nmax_exact_closures = 0", "verify.max_exact_closures: must be >= 1"),
    ("[verify]\nunseen_slip_rounds = -1", "verify.unseen_slip_rounds: must be >= 0"),
    ("[verify]\nunseen_slip_max_m = 0.0", "verify.unseen_slip_max_m: must be > 0"),
    ("[verify]\nunseen_slip_max_rad = \"5 deg\"", "verify.unseen_slip_max_rad: must be a number"),
    ("[calibration]\nmin_significance = -1.0", "calibration.min_significance: must be >= 0"),
    ("[candidates]\nodometry_revisit_first = \"yes\"", "candidates.odometry_revisit_first: must be true or false"),
    ("[registration]\nmin_line_points = 40", "min_line_points: must not exceed line_neighbours"),
    ("[registration]\npoint_features = 2", "registration.point_features: must be true or false"),
    ("[registration]\nrival_probability = 1.5", "registration.rival_probability: must be < 1"),
    ("verify = 3", "verify: must be a table"),
    ("[review]\ndecisions = [[1, 2, \"maybe\"]]",
     "review.decisions: row 1: column \"decision\": must be accept or reject"),
    ("[review]\ndecisions = [[1, 2, \"accept\"], [2, 1, \"reject\"]]",
     "review.decisions: row 2: pair (2, 1) is decided twice"),
    ("[review]\ndecisions = 5", "review.decisions: must be a list"),
]


@pytest.mark.parametrize("text,words", BAD, ids=[b[1].split(":")[0] for b in BAD])
def test_a_bad_setting_fails_before_any_scan_is_read(tmp_path, capsys, text, words):
    cfg = tmp_path / "bad.toml"
    cfg.write_text(text + "\n")
    # The log does not exist: a check made after reading would complain about it instead.
    code = cli.main(["run", str(tmp_path / "missing.jsonl"), "--out", str(tmp_path / "out"), "--config", str(cfg),
                     "-q"])
    err = capsys.readouterr().err.strip()
    assert code == 2
    assert err.count("\n") == 0
    assert words in err and "bad.toml" in err and "missing.jsonl" not in err
    assert not (tmp_path / "out").exists()


def test_a_huge_bad_value_is_quoted_short(tmp_path):
    cfg = tmp_path / "big.toml"
    cfg.write_text('[verify]\nkernel = "' + "k" * 2_000_000 + '"\n')
    with pytest.raises(InputError) as err:
        build_config(cfg)
    assert len(str(err.value)) < 400 and "characters" in str(err.value)


def test_command_line_values_are_checked_like_the_file(tmp_path, capsys):
    code = cli.main(["run", str(tmp_path / "missing.jsonl"), "--out", str(tmp_path / "o"), "--min-overlap", "7"])
    assert code == 2
    assert "verify.min_overlap: must be <= 1" in capsys.readouterr().err


def test_toml_syntax_error_names_the_file(tmp_path):
    path = tmp_path / "bad.toml"
    path.write_text("[inner\nx = 1\n")
    with pytest.raises(InputError, match="bad.toml: not valid TOML"):
        load_toml(path)


def test_an_integer_beyond_float_range_is_refused_not_a_crash(tmp_path):
    cfg = tmp_path / "huge.toml"
    cfg.write_text("[verify]\nmin_overlap = " + "9" * 401 + "\n")
    try:
        build_config(cfg)
    except InputError as exc:
        assert "verify.min_overlap: must be a finite number" in str(exc) and "huge.toml" in str(exc)
    else:
        raise AssertionError("accepted a 401-digit min_overlap")
