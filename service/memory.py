"""Memory settings of the API and worker processes.

glibc's malloc gives each thread that finds the shared heap busy an arena of its own, up
to eight per core, and an arena keeps the high-water mark of what its threads allocated.
The API answers from a pool of dozens of threads, and some answers are large (a page of
1,000 trials runs to hundreds of KB of JSON): in a 20-minute soak the API's RSS rose in
steps of about 16 MiB, 16% after the warm-up, while two arenas kept it flat (+0.7%, same load;
docs/measured-facts.md §7). The workers train in few threads and are left alone.
"""

from __future__ import annotations

import ctypes
import ctypes.util
import os
import sys

#: glibc's ``M_ARENA_MAX`` option number for ``mallopt``.
_M_ARENA_MAX = -8
ARENAS = 2


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

