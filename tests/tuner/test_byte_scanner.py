"""The byte scan fed in pieces (as an upload arrives) finds what one pass over the file finds."""

from __future__ import annotations

import random

import pytest

from tuner.errors import DatasetError
from tuner.io.csvcheck import ByteScanner, scan_bytes

CLEAN = [
    b"a,b\n1,2\n",
    "name,place\nK\u00f6ln,\u00e9t\u00e9\n\u4e2d,\u6587\n".encode(),  # multi-byte characters
    b'a,b\n"x, y",0x1F\n',
    b"a,b\n10,0x1\n",  # split between "0" and "x", a "0x" lies across a border
]
FAULTY = [
    (b"a,b\n1,2\n3,\x00\n", "NUL byte on line 3"),
    (b"a,b\n1,2\n\xe9t\xe9,3\n", "line 3"),
    ("a,b\n1,2\n".encode("utf-16"), "UTF-16"),
    (b"a,b\n1,2\nend\xc3", "not valid UTF-8"),  # a character cut off at the end of the file
]


def _fed(data: bytes, cuts: list[int]) -> ByteScanner:
    scanner = ByteScanner()
    start = 0
    for cut in [*sorted(cuts), len(data)]:
        scanner.feed(data[start:cut])
        start = cut
    return scanner


@pytest.mark.parametrize("data", CLEAN)
def test_pieces_agree_with_one_pass(tmp_path, data):
    path = tmp_path / "t.csv"
    path.write_bytes(data)
    whole = scan_bytes(path)
    rng = random.Random(7)
    for _ in range(50):  # every split, multi-byte characters and "0x" cut in two included
        cuts = rng.sample(range(1, len(data)), k=min(3, len(data) - 1))
        assert _fed(data, cuts).result(path) == whole
    for cut in range(1, len(data)):
        assert _fed(data, [cut]).result(path) == whole


def test_hex_and_quotes_seen_across_borders(tmp_path):
    data = b"a,b\n10,0x1\n"
    path = tmp_path / "t.csv"
    path.write_bytes(data)
    found = _fed(data, [data.index(b"x")])  # "0" ends one piece, "x" starts the next
    assert found.result(path).hex_prefix is True
    assert found.result(path).quoted is False


@pytest.mark.parametrize(("data", "message"), FAULTY)
def test_faults_raised_with_the_same_message(tmp_path, data, message):
    path = tmp_path / "t.csv"
    path.write_bytes(data)
    with pytest.raises(DatasetError) as whole:
        scan_bytes(path)
    assert message in str(whole.value)
    for cut in range(1, len(data)):
        scanner = _fed(data, [cut])
        with pytest.raises(DatasetError) as pieces:
            scanner.result(path)
        assert str(pieces.value) == str(whole.value)
        assert pieces.value.errors == whole.value.errors
