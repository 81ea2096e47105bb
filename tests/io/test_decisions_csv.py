"""Reviewer decisions (docs/formats.md, "Reviewer decisions"): reading with one-line errors naming file and line."""

import numpy as np
import pytest

from closurecheck.errors import InputError
from closurecheck.io.decisions_csv import decision_rows, read_decisions


def _write(tmp_path, text, name="decisions.csv"):
    p = tmp_path / name
    p.write_text(text, encoding="utf-8")
    return p


def test_reads_pairs_words_and_notes(tmp_path):
    p = _write(tmp_path, 'note,decision,to,from\n"walls line up, checked",Accept,40,812\n,reject,3,7\n\n'
                         'same again,accept,812,40\n')
    d = read_decisions(p, 1000)
    assert d.src.tolist() == [812, 7] and d.dst.tolist() == [40, 3]
    assert d.accept.tolist() == [True, False]
    assert d.note.tolist() == ["walls line up, checked", ""]
    assert d.lines.tolist() == [2, 3]
    assert d.rows() == ((812, 40, "accept", "walls line up, checked"), (7, 3, "reject", ""))
    np.testing.assert_array_equal(d.scan_ids, [3, 7, 40, 812])


def test_without_note_column_and_header_only(tmp_path):
    assert read_decisions(_write(tmp_path, "from,to,decision\n1,2,reject\n")).note.tolist() == [""]
    assert len(read_decisions(_write(tmp_path, "from,to,decision,note\n"))) == 0


@pytest.mark.parametrize("text, line, needle", [
    ("from,to,decision\n1,2,maybe\n", 2, 'column "decision": must be accept or reject'),
    ("from,to,decision\n1,2,\n", 2, "must be accept or reject"),
    ("from,to,decision\n1,2,accept\n3,99,reject\n", 3, "unknown scan id 99"),
    ("from,to,decision\n-1,2,accept\n", 2, "non-negative integer"),
    ("from,to,decision\n1,x,accept\n", 2, 'column "to": scan id must be an integer'),
    ("from,to,decision\n1,2,accept\n2,1,reject\n", 3, "decided twice, differently (line 2 says accept)"),
    ("from,to,decision\n4,4,accept\n", 2, "same scan"),
    ("from,to,verdict\n1,2,accept\n", 1, 'missing column "decision"'),
    ("to,decision\n1,accept\n", 1, 'missing column "from"'),
    ("from,to,decision\n1,2\n", 2, "row has 2 cells"),
    ("from,to,decision,decision\n1,2,accept,accept\n", 1, "appears twice"),
    ("", 1, "missing header row"),
])
def test_errors_name_file_line_and_problem(tmp_path, text, line, needle):
    p = _write(tmp_path, text)
    with pytest.raises(InputError) as err:
        read_decisions(p, 10)
    msg = str(err.value)
    assert msg.startswith(f"{p}:{line}: "), msg
    assert needle in msg, msg
    assert "\n" not in msg


def test_missing_file_is_input_error(tmp_path):
    with pytest.raises(InputError, match="no such file"):
        read_decisions(tmp_path / "nope.csv")


def test_config_rows_follow_the_same_rules():
    with pytest.raises(InputError, match=r"^review.decisions:2: .*must be accept or reject"):
        decision_rows([[1, 2, "accept"], [3, 4, "perhaps"]], source="review.decisions")
    with pytest.raises(InputError, match="non-negative integer"):
        decision_rows([[1.5, 2, "accept"]])
    with pytest.raises(InputError, match=r"\[from, to, decision\]"):
        decision_rows([[1, 2]])
    with pytest.raises(InputError, match="note"):
        decision_rows([[1, 2, "reject", 7]])
