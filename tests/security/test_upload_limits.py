"""Uploads that try to get past the size limits: a Parquet decompression bomb, and
multipart and chunked bodies far over the limit, watched on disk while they stream."""

from __future__ import annotations

import io
from collections.abc import Iterator
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from tests.conftest import Server
from tests.security.attack import MB, bytes_under, send_big_body, vm_hwm_mb

pytestmark = pytest.mark.e2e
LIMIT_MB = 2


@pytest.fixture(scope="module")
def small_limits(tmp_path_factory: pytest.TempPathFactory) -> Iterator[Server]:
    root = tmp_path_factory.mktemp("limits")
    spool = root / "system-tmp"  # the server's TMPDIR: where a form parser would spool
    spool.mkdir()
    srv = Server(home=root / "home", workers=0,
                 extra_env={"GROVEKEEPER_MAX_UPLOAD_MB": str(LIMIT_MB),
                            "TMPDIR": str(spool)}).start()
    srv.extra_env["spool"] = str(spool)
    try:
        yield srv
    finally:
        srv.stop()


def _bomb(rows: int) -> bytes:
    """``rows`` x 2 zeros: runs of one value, which Parquet stores in a few bytes."""
    block = pa.table({"a": np.zeros(1_000_000, dtype=np.int64),
                      "b": np.zeros(1_000_000, dtype=np.int64)})
    sink = io.BytesIO()
    with pq.ParquetWriter(sink, block.schema, compression="zstd") as writer:
        for _ in range(rows // 1_000_000):  # bounded: one row group per million rows
            writer.write_table(block, row_group_size=1_000_000)
    return sink.getvalue()


def test_parquet_bomb_is_refused_from_its_footer(small_limits: Server) -> None:
    bomb = _bomb(100_000_000)
    assert len(bomb) < LIMIT_MB * MB  # it passes the upload limit itself
    assert small_limits.proc is not None
    before = vm_hwm_mb(small_limits.proc.pid)
    with small_limits.client() as client:
        raw = client.post("/v1/datasets", params={"name": "bomb"}, content=bomb,
                          headers={"Content-Type": "application/vnd.apache.parquet"})
        form = client.post("/v1/datasets", files={"file": ("bomb.parquet", bomb)})
        listed = client.get("/v1/datasets").json()["total"]
    after = vm_hwm_mb(small_limits.proc.pid)
    for got in (raw, form):
        assert got.status_code == 413, got.text
        assert "Parquet" in got.json()["detail"] and "100000000 rows" in got.json()["detail"]
    assert listed == 0
    # 100M rows x 2 int64 columns would be 1.6 GB once read; the footer check reads none.
    assert after - before < 100, f"peak RSS rose {after - before:.0f} MB"


def test_a_parquet_file_within_the_limits_is_stored(small_limits: Server) -> None:
    table = pa.table({"a": np.arange(1000, dtype=np.int64), "b": np.ones(1000)})
    sink = io.BytesIO()
    pq.write_table(table, sink)
    with small_limits.client() as client:
        got = client.post("/v1/datasets", files={"file": ("ok.parquet", sink.getvalue())})
        assert got.status_code == 201, got.text
        assert got.json()["rows"] == 1000
        client.delete(f"/v1/datasets/{got.json()['id']}")


def test_unreadable_parquet_footer_is_422(small_limits: Server) -> None:
    with small_limits.client() as client:
        got = client.post("/v1/datasets", params={"name": "broken"},
                          content=b"PAR1" + b"\x00" * 100 + b"PAR1",
                          headers={"Content-Type": "application/vnd.apache.parquet"})
        assert got.status_code == 422, got.text


@pytest.mark.parametrize("chunked", [False, True], ids=["content-length", "chunked"])
def test_multipart_over_the_limit_never_exceeds_it_on_disk(small_limits: Server,
                                                           chunked: bool) -> None:
    spool = Path(small_limits.extra_env["spool"])
    watched = (small_limits.home, spool)
    baseline = bytes_under(*watched)
    peak = baseline
    boundary = "gkboundary"
    prefix = (f"--{boundary}\r\nContent-Disposition: form-data; name=\"file\"; "
              f"filename=\"big.csv\"\r\nContent-Type: text/csv\r\n\r\nx,y\r\n").encode()

    def look() -> None:
        nonlocal peak
        peak = max(peak, bytes_under(*watched))

    headers = {"Content-Type": f"multipart/form-data; boundary={boundary}"}
    # A lying Content-Length would be refused at once; send the true one so the body
    # has to be counted as it streams (and chunked bodies declare no size at all).
    status, sent = send_big_body(small_limits.port, "/v1/datasets", total=60 * MB,
                                 chunked=chunked, headers=headers, prefix=prefix,
                                 each_megabyte=look)
    look()
    assert status == 413, (status, sent)
    assert peak - baseline <= LIMIT_MB * MB + MB, f"{(peak - baseline) / MB:.1f} MB on disk"
    assert bytes_under(*watched) - baseline < MB  # and nothing left behind


def test_file_part_just_over_the_limit_is_refused_by_the_running_count(
        small_limits: Server) -> None:
    # Under the whole-body guard (limit plus room for the multipart framing), so this is
    # the upload reader's own running count that refuses it.
    body = b"x,y\n" + b"1,2\n" * ((LIMIT_MB * MB + 8192) // 4)
    spool = Path(small_limits.extra_env["spool"])
    with small_limits.client() as client:
        got = client.post("/v1/datasets", files={"file": ("big.csv", body, "text/csv")})
        assert got.status_code == 413, got.text
        assert client.get("/v1/datasets").json()["total"] == 0
    assert bytes_under(spool, small_limits.home / "tmp") == 0
