"""Candidate-pairs CSV (docs/formats.md, "Candidate pairs"): reading with clear errors, atomic writing."""

import csv
import math

import numpy as np
import pytest

from closurecheck.errors import InputError
from closurecheck.io.pairs_csv import OUTPUT_COLUMNS, read_candidates, read_pairs, write_candidates


def _write(tmp_path, text, name="pairs.csv"):
    p = tmp_path / name
    p.write_text(text, encoding="utf-8")
    return p


def test_reads_ids_and_optional_guess(tmp_path):
    p = _write(tmp_path, "from,to,dx,dy,dtheta,note\n812,40,0.5,-0.25,0.1,x\n7,3,,,,\n\n")
    pairs = read_pairs(p, 1000)
    np.testing.assert_array_equal(pairs.src, [812, 7])
    np.testing.assert_array_equal(pairs.dst, [40, 3])
    np.testing.assert_allclose(pairs.guess[0], [0.5, -0.25, 0.1])
    assert np.isnan(pairs.guess[1]).all()
    np.testing.assert_array_equal(pairs.lines, [2, 3])
    np.testing.assert_array_equal(pairs.scan_ids, [3, 7, 40, 812])


def test_columns_in_any_order_without_guess_and_with_bom(tmp_path):
    p = tmp_path / "pairs.csv"
    p.write_bytes("\ufeffto , from\n1,2\n".encode("utf-8"))
    pairs = read_pairs(p, 3)
    assert pairs.src.tolist() == [2] and pairs.dst.tolist() == [1]
    assert pairs.guess.shape == (1, 3) and np.isnan(pairs.guess).all()


def test_header_only_gives_no_pairs(tmp_path):
    assert len(read_pairs(_write(tmp_path, "from,to\n"), 10)) == 0


@pytest.mark.parametrize("text, line, needle", [
    ("from,to\n1,2\n3,99\n", 3, 'unknown scan id 99'),
    ("from,to\n-1,2\n", 2, "unknown scan id -1"),
    ("from,too\n1,2\n", 1, 'missing column "to"'),
    ("to\n1\n", 1, 'missing column "from"'),
    ("from,to\n1,x\n", 2, "scan id must be an integer"),
    ("from,to\n1.5,2\n", 2, "scan id must be an integer"),
    ("from,to,dx,dy,dtheta\n1,2,0,abc,0\n", 2, 'column "dy": not a number'),
    ("from,to,dx,dy,dtheta\n1,2,0,nan,0\n", 2, "must be finite"),
    ("from,to,dx,dy,dtheta\n1,2,0,,0\n", 2, 'column "dy" is empty'),
    ("from,to,dx,dy\n1,2,0,0\n", 1, 'missing "dtheta"'),
    ("from,to\n4,4\n", 2, "same scan"),
    ("from,to\n1,2\n2,1\n", 3, "given twice (first on line 2)"),
    ("from,to,dx\n", 1, "dx,dy,dtheta"),
    ("from,to,dx,dy,dtheta\n1,2\n", 2, "row has 2 cells"),
    ("", 1, "missing header row"),
    ("from,to,score\n1,2,0.5\n3,4,high\n", 3, 'column "score": not a number'),
    ("from,to,score\n1,2,inf\n", 2, 'column "score": value must be finite'),
    ("from,to,score,score\n1,2,0.5,0.5\n", 1, 'column "score" appears twice'),
])
def test_errors_name_file_line_and_problem(tmp_path, text, line, needle):
    p = _write(tmp_path, text)
    with pytest.raises(InputError) as err:
        read_pairs(p, 10)
    msg = str(err.value)
    assert msg.startswith(f"{p}:{line}: "), msg
    assert needle in msg, msg
    assert "\n" not in msg


def test_missing_file_is_input_error(tmp_path):
    with pytest.raises(InputError, match="no such file"):
        read_pairs(tmp_path / "nope.csv", 10)


def test_written_file_has_contract_columns_and_reads_back(tmp_path):
    out = tmp_path / "candidates.csv"
    delta = np.array([[0.1, -0.2, 0.3], [np.nan, np.nan, np.nan], [1 / 3, 2e-9, -math.pi]])
    write_candidates(out, [812, 5, 9], [40, 1, 2], ["accepted", "rejected", "accepted"],
                     ["ok", "no-overlap", "ok"], delta,
                     extra={"source": ["descriptor", "proximity", "external"], "rmse_m": [0.01, np.nan, 0.02]})
    with open(out, newline="", encoding="utf-8") as fh:
        rows = list(csv.reader(fh))
    assert rows[0] == list(OUTPUT_COLUMNS) + ["source", "rmse_m"]
    assert rows[2] == ["5", "1", "rejected", "no-overlap", "", "", "", "proximity", ""]
    # Full float precision survives the round trip; the output is valid input.
    back = read_pairs(out, 1000)
    np.testing.assert_array_equal(back.src, [812, 5, 9])
    np.testing.assert_array_equal(back.guess[[0, 2]], delta[[0, 2]])
    assert np.isnan(back.guess[1]).all()


def test_bad_verdict_leaves_previous_file_untouched(tmp_path):
    out = tmp_path / "candidates.csv"
    write_candidates(out, [1], [0], ["accepted"], ["ok"], [[0, 0, 0]])
    before = out.read_bytes()
    with pytest.raises(ValueError, match="verdict"):
        write_candidates(out, [1], [0], ["maybe"], ["ok"], [[0, 0, 0]])
    with pytest.raises(ValueError, match="clashes"):
        write_candidates(out, [1], [0], ["accepted"], ["ok"], [[0, 0, 0]], extra={"reason": ["x"]})
    assert out.read_bytes() == before
    assert [p.name for p in tmp_path.iterdir()] == ["candidates.csv"]


def test_failure_during_writing_publishes_nothing(tmp_path):
    out = tmp_path / "candidates.csv"

    class Boom:
        def __str__(self):
            raise RuntimeError("boom")

    with pytest.raises(RuntimeError):
        write_candidates(out, [1, 2], [0, 0], ["accepted", "accepted"], ["ok", "ok"], np.zeros((2, 3)),
                         extra={"note": ["fine", Boom()]})
    assert list(tmp_path.iterdir()) == []


def test_score_column_is_optional_and_empty_cells_mean_no_score(tmp_path):
    assert read_pairs(_write(tmp_path, "from,to\n1,2\n"), 10).score is None
    pairs = read_pairs(_write(tmp_path, "from,to,score\n1,2,0.75\n3,4,\n5,6,-2e3\n"), 10)
    assert pairs.score[0] == 0.75 and math.isnan(pairs.score[1]) and pairs.score[2] == -2000.0


def test_score_survives_the_output_file(tmp_path):
    # The front-end's score is a column of candidates.csv and reads back from it, as input and as verdicts.
    out = tmp_path / "candidates.csv"
    write_candidates(out, [7, 9], [1, 2], ["accepted", "rejected"], ["accepted", "odometry_gate"],
                     np.zeros((2, 3)), extra={"origin": ["external", "external"], "score": [0.125, np.nan]})
    back = read_pairs(out, 10)
    assert back.score[0] == 0.125 and math.isnan(back.score[1])
    rows = read_candidates(out)
    assert rows.frontend_score[0] == 0.125 and math.isnan(rows.frontend_score[1])
    assert rows.origin.tolist() == ["external", "external"]
    assert read_candidates(_write(tmp_path, ",".join(OUTPUT_COLUMNS) + "\n", "empty.csv")).frontend_score is None


@pytest.mark.parametrize("values", [
    np.array([True, False]),
    np.array([3, -7, 0], dtype=np.int32),
    np.array([7, 65535], dtype=np.uint16),
    np.array([0.1, np.nan, -np.inf, 1e300, 5e-324, -0.0]),
    np.array([0.1, np.nan], dtype=np.float32),
    np.array(["a,b", 'q"x', ""]),
    np.array([None, 1.5, float("nan"), True, np.int32(3), "t"], dtype=object),
], ids=["bool", "int32", "uint16", "float64", "float32", "str", "object"])
def test_cells_of_a_column_are_the_cells_of_its_values(values):
    from closurecheck.io.pairs_csv import _cell, _cells

    assert _cells(values) == [_cell(v) for v in np.asarray(values, dtype=object)]
