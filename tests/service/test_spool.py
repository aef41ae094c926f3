"""The upload spool: what it writes, hashes and scans is exactly what was received."""

from __future__ import annotations

import asyncio
import hashlib
import random

import pytest

from service.api import spool as spool_module
from service.api.spool import Spool
from tuner.io.csvcheck import ByteScanner, scan_bytes


def _chunks(data: bytes, seed: int) -> list[bytes]:
    rng, out, at = random.Random(seed), [], 0
    while at < len(data):
        size = rng.choice([1, 7, 4096, 65536, 300_000])
        out.append(data[at:at + size])
        at += size
    return out


def test_written_hashed_and_scanned_in_order(tmp_path, monkeypatch):
    monkeypatch.setattr(spool_module, "MAX_PENDING", 1)  # the receiver waits often
    rows = "".join(f"{i},{i * 0.5},k\u00f6ln-{i % 7}\n" for i in range(60_000))
    data = ("id,x,place\n" + rows).encode()
    dest = tmp_path / "upload.csv"

    async def receive() -> tuple[str, ByteScanner, int]:
        scanner = ByteScanner()
        with open(dest, "wb") as out, Spool(out, scanner) as spool:
            for chunk in _chunks(data, seed=3):
                await spool.write(chunk)
            digest = await spool.finish()
        return digest, scanner, spool.size

    digest, scanner, size = asyncio.run(receive())
    assert dest.read_bytes() == data
    assert digest == hashlib.sha256(data).hexdigest()  # hashlib over the whole body
    assert size == len(data)
    assert scanner.result(dest) == scan_bytes(dest)


def test_a_failed_write_reaches_the_receiver(tmp_path):
    async def receive() -> None:
        out = open(tmp_path / "x", "wb")  # noqa: SIM115 - closed below, mid-upload
        with Spool(out) as spool:
            await spool.write(b"a" * spool_module.BATCH)
            out.close()  # the disk "goes away": the next write fails on the thread
            await spool.write(b"b" * spool_module.BATCH)
            await spool.finish()

    with pytest.raises(ValueError, match="closed file"):
        asyncio.run(receive())
