"""Writing an upload to disk off the event loop.

The event loop only receives: the bytes go, in batches of about a megabyte, to a thread
of their own that hashes them (sha256), writes them to the temporary file and scans them
for the faults a CSV parse would refuse (NUL bytes, text that is not UTF-8; see
``tuner.io.csvcheck.ByteScanner``). Hashing alone held the loop for a tenth of a second
per 150 MB, and while it ran no other request was answered. At most a few batches wait
for the thread, so a client sending faster than the disk takes stays bounded in memory.
"""

from __future__ import annotations

import asyncio
import hashlib
from collections import deque
from concurrent.futures import Future, ThreadPoolExecutor
from typing import Any, BinaryIO

#: Bytes gathered before they are handed to the thread.
BATCH = 1 << 20
#: Batches handed over and not yet written, beyond which the receiver waits.
MAX_PENDING = 8


class Spool:
    """Hash, write and scan an upload's bytes on a thread; ``await finish()`` at the end.

    ``scanner`` is anything with ``feed(bytes)`` (a ``ByteScanner``), or None. Use it as
    a context manager so the thread stops when the upload is refused half-way.
    """

    def __init__(self, out: BinaryIO, scanner: Any = None) -> None:
        self.out = out
        self.scanner = scanner
        self.digest = hashlib.sha256()
        self.size = 0
        self._parts: list[bytes] = []
        self._gathered = 0
        self._pending: deque[Future[None]] = deque()
        self._pool = ThreadPoolExecutor(max_workers=1, thread_name_prefix="gk-spool")

    def __enter__(self) -> Spool:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    def add(self, chunk: bytes) -> None:
        """Take ``chunk`` (from the event loop); a full batch goes to the thread."""
        self.size += len(chunk)
        self._parts.append(chunk)
        self._gathered += len(chunk)
        if self._gathered >= BATCH:
            self._hand_over()

    async def settle(self) -> None:
        """Wait while too many batches are queued (back-pressure on the sender)."""
        while len(self._pending) > MAX_PENDING:
            await asyncio.wrap_future(self._pending.popleft())

    async def write(self, chunk: bytes) -> None:
        self.add(chunk)
        await self.settle()

    async def finish(self) -> str:
        """Write what is left, wait for the thread; the sha256 of everything added."""
        self._hand_over()
        try:
            while self._pending:
                await asyncio.wrap_future(self._pending.popleft())
        finally:
            self.close()
        return self.digest.hexdigest()

    def close(self) -> None:
        """Stop the thread (what is queued is still written); safe to call twice."""
        self._pool.shutdown(wait=True)

    def _hand_over(self) -> None:
        if not self._parts:
            return
        block = self._parts[0] if len(self._parts) == 1 else b"".join(self._parts)
        self._parts, self._gathered = [], 0
        self._pending.append(self._pool.submit(self._consume, block))

    def _consume(self, block: bytes) -> None:
        self.digest.update(block)
        self.out.write(block)
        if self.scanner is not None:
            self.scanner.feed(block)
