"""The API process's malloc arena cap (service/memory.py; why: docs/measured-facts.md §7)."""

from __future__ import annotations

import platform

import pytest

from service.memory import limit_malloc_arenas


@pytest.mark.skipif(platform.libc_ver()[0] != "glibc", reason="glibc only")
def test_the_cap_is_set_on_glibc_and_the_environment_wins(
        monkeypatch: pytest.MonkeyPatch) -> None:
    assert limit_malloc_arenas() is True  # glibc's mallopt accepted it
    monkeypatch.setenv("MALLOC_ARENA_MAX", "4")  # an operator's own choice is kept
    assert limit_malloc_arenas() is False
