"""Memory settings of the API and worker processes.

glibc's malloc gives each thread that finds the shared heap busy an arena of its own, up
to eight per core, and an arena keeps the high-water mark of what its threads allocated.
The API answers from a pool of dozens of threads, and some answers are large (a page of
1,000 trials runs to hundreds of KB of JSON): in a 20-minute soak the API's RSS rose in
steps of about 16 MiB, 16% after the warm-up, while two arenas kept it flat (+0.7%, same load;
docs/measured-facts.md §7).

A worker allocates and frees table-sized blocks (a column of a million rows is 8 MB; the
float matrix LightGBM bins is the rows times the columns): glibc serves blocks of up to
32 MB from its heap once a few have been freed (its mmap threshold rises), and memory
freed inside the heap stays with the process; Arrow's default pool (mimalloc) keeps what a
Parquet read freed too. So a worker lets glibc map every block from
:data:`MMAP_THRESHOLD` up on its own (returned to the system when freed), gives Arrow the
system allocator, and trims the heap after each step of a job: measured on a 134 MiB
table, the 320 MiB held after reading it fell to the frame's own size
(docs/measured-facts.md §8).
"""

from __future__ import annotations

import ctypes
import ctypes.util
import os
import sys

#: glibc's ``M_ARENA_MAX`` and ``M_MMAP_THRESHOLD`` option numbers for ``mallopt``.
_M_ARENA_MAX = -8
_M_MMAP_THRESHOLD = -3
ARENAS = 2
#: Blocks from this size up are mapped on their own. Above the buffers a boosting round
#: allocates (a prediction of 100,000 validation rows is 0.8 MB), below a column of a
#: large table; fixed, so glibc no longer raises it.
MMAP_THRESHOLD = 4 * 1024 * 1024


def _glibc() -> ctypes.CDLL | None:
    if not sys.platform.startswith("linux"):
        return None
    try:
        libc = ctypes.CDLL(ctypes.util.find_library("c") or "libc.so.6")
    except OSError:
        return None
    return libc if hasattr(libc, "gnu_get_libc_version") else None  # musl: mallopt is a no-op


def return_freed_memory(threshold: int = MMAP_THRESHOLD) -> bool:
    """Map blocks of ``threshold`` bytes and more on their own, so freeing them returns
    them to the system at once (a worker, at start). ``MALLOC_MMAP_THRESHOLD_`` in the
    environment wins; True if glibc took the setting.

    Arrow's pool is chosen by ``ARROW_DEFAULT_MEMORY_POOL`` before pyarrow loads (the
    worker command sets ``system``): switching it later leaves the Parquet reader on
    mimalloc (measured).
    """
    libc = _glibc()
    if libc is None or "MALLOC_MMAP_THRESHOLD_" in os.environ:
        return False
    return bool(libc.mallopt(_M_MMAP_THRESHOLD, threshold))


def trim() -> None:
    """Give the heap's free pages back to the system (glibc's ``malloc_trim``): after a
    step that freed a lot in blocks below the mmap threshold (reading and preparing a
    table, a search, a refit)."""
    libc = _glibc()
    if libc is not None:
        libc.malloc_trim(0)


def limit_malloc_arenas(arenas: int = ARENAS) -> bool:
    """Cap this process's malloc arenas (glibc on Linux); True if the cap was set.

    ``MALLOC_ARENA_MAX`` in the environment wins (glibc reads it itself), and any other C
    library is left alone. Call it early, before the threads that allocate start.
    """
    if not sys.platform.startswith("linux") or "MALLOC_ARENA_MAX" in os.environ:
        return False
    try:
        libc = ctypes.CDLL(ctypes.util.find_library("c") or "libc.so.6")
        if not hasattr(libc, "gnu_get_libc_version"):
            return False  # not glibc (musl's mallopt does nothing)
        return bool(libc.mallopt(_M_ARENA_MAX, arenas))
    except (OSError, AttributeError):
        return False


#: jemalloc settings for pyarrow's allocator: hand freed pages back to the system at once.
#: pyarrow's own default keeps them about a second, so while an upload is parsed and
#: converted to pandas, the freed parse buffers stayed resident beside the new frame
#: (measured on a 1,000,000 x 20 table: +213 MiB over the frame's 189 MiB with this
#: setting, +392 MiB without). ``pyarrow.jemalloc_set_decay_ms`` cannot do it later: it
#: changes only arenas created after the call.
ARROW_JEMALLOC_CONF = "dirty_decay_ms:0,muzzy_decay_ms:0"


def arrow_returns_memory() -> bool:
    """Set :data:`ARROW_JEMALLOC_CONF` for this process and its children; True if set.

    pyarrow's jemalloc reads ``JE_ARROW_MALLOC_CONF`` once, when pyarrow loads, so this
    must run before anything imports pyarrow. A value already in the environment wins.
    """
    if "pyarrow" in sys.modules or "JE_ARROW_MALLOC_CONF" in os.environ:
        return False
    os.environ["JE_ARROW_MALLOC_CONF"] = ARROW_JEMALLOC_CONF
    return True

