"""The quote-free fast path of the CSV check must refuse exactly what the csv-module path
refuses, with the same line numbers and messages."""

from __future__ import annotations

import pytest

from tuner import DatasetError
from tuner.io.csvcheck import check_csv

CASES = [
    ("a,b,c\n1,2,3\n4,5\n6,7,8\n", "line 3"),          # short row
    ("a,b,c\n1,2,3\n4,5,6,7\n", "line 3"),              # long row
    ("a,b,c\r\n1,2,3\r\n\r\n4;5;6\r\n", "line 4"),      # blank line, then semicolons
    ("a,b\n" + "1,2\n" * 5000 + "3\n", "line 5002"),    # far down the file
    ("a,b\n1,2\n3", "line 3"),                           # last line without newline
]


@pytest.mark.parametrize(("text", "where"), CASES)
def test_fast_and_slow_paths_agree(tmp_path, text: str, where: str) -> None:
    fast, slow = tmp_path / "fast.csv", tmp_path / "slow.csv"
    fast.write_text(text)
    # The same table with one harmless quoted header field takes the csv-module path.
    slow.write_text('"a"' + text[1:])
    errors = []
    for path in (fast, slow):
        with pytest.raises(DatasetError) as info:
            check_csv(path)
        errors.append(info.value.errors[0])
    assert errors[0] == errors[1]
    assert errors[0]["field"] == where


def test_clean_files_pass_both_paths(tmp_path) -> None:
    text = "a,b,c\n1,2,3\n\n4,5,6\n"
    (tmp_path / "f.csv").write_text(text)
    (tmp_path / "s.csv").write_text('"a"' + text[1:])
    assert check_csv(tmp_path / "f.csv") == check_csv(tmp_path / "s.csv") == ["a", "b", "c"]
