"""Memory settings of the API and the workers (service/memory.py; why:
docs/measured-facts.md §7 and §8), and a worker that is ready before it is idle."""

from __future__ import annotations

import platform
import subprocess
import sys
import time
from pathlib import Path

import pytest

from service.memory import limit_malloc_arenas, return_freed_memory, trim
from tests.conftest import ROOT, child_env


@pytest.mark.skipif(platform.libc_ver()[0] != "glibc", reason="glibc only")
def test_the_cap_is_set_on_glibc_and_the_environment_wins(
        monkeypatch: pytest.MonkeyPatch) -> None:
    assert limit_malloc_arenas() is True  # glibc's mallopt accepted it
    monkeypatch.setenv("MALLOC_ARENA_MAX", "4")  # an operator's own choice is kept
    assert limit_malloc_arenas() is False


@pytest.mark.skipif(platform.libc_ver()[0] != "glibc", reason="glibc only")
def test_the_mmap_threshold_is_set_on_glibc_and_the_environment_wins(
        monkeypatch: pytest.MonkeyPatch) -> None:
    assert return_freed_memory() is True
    trim()
    monkeypatch.setenv("MALLOC_MMAP_THRESHOLD_", "131072")
    assert return_freed_memory() is False


def _mapped(pid: int, name: str) -> bool:
    return name in Path(f"/proc/{pid}/maps").read_text()


@pytest.mark.skipif(not sys.platform.startswith("linux"), reason="reads /proc")
def test_a_worker_loads_a_jobs_libraries_before_it_says_ready(tmp_path: Path) -> None:
    log_path, home = tmp_path / "worker.log", tmp_path / "home"
    home.mkdir()  # the database's folder, as serve or migrate would have made it
    with open(log_path, "wb") as log:
        proc = subprocess.Popen([sys.executable, "-m", "service", "worker"],
                                env=child_env(home), stdout=log,
                                stderr=subprocess.STDOUT, cwd=ROOT)
    try:
        deadline = time.monotonic() + 120
        while " ready on " not in log_path.read_text():
            assert proc.poll() is None, log_path.read_text()
            assert time.monotonic() < deadline, log_path.read_text()
            time.sleep(0.1)
        text = log_path.read_text()
        assert text.index("libraries loaded in") < text.index(" ready on ")
        # No job has run: the Parquet reader and LightGBM are mapped already.
        assert _mapped(proc.pid, "libparquet") and _mapped(proc.pid, "lib_lightgbm")
    finally:
        proc.terminate()
        proc.wait(timeout=60)
