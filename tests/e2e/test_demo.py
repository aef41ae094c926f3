"""``grovekeeper demo`` as a new user runs it: the terminal tells the story (progress,
leaderboards, winners, predictions, where the report pages are), the server's and
workers' log lines go to the file the demo names, and the report links it prints open in
a browser's place (no header) while it keeps serving."""

from __future__ import annotations

import re
import signal
import subprocess
import sys
import time
from pathlib import Path

import httpx
import pytest

from tests.conftest import ROOT, child_env

pytestmark = pytest.mark.e2e
# A line as service/logs.py's text formatter writes it: "2026-12-03 08:00:00,123 INFO ...".
LOG_LINE = re.compile(r"^\d{4}-\d\d-\d\d \d\d:\d\d:\d\d,\d+ (DEBUG|INFO|WARNING|ERROR)\b")


def test_demo_output_is_the_story_and_the_logs_go_to_a_file(tmp_path: Path) -> None:
    log = tmp_path / "demo.log"
    demo = subprocess.Popen(
        [sys.executable, "-u", "-m", "service", "demo", "--trials", "3", "--log", str(log),
         "--with-key", "--serve"],
        env=child_env(tmp_path / "unused-home"), cwd=ROOT, stdout=subprocess.PIPE,
        stderr=subprocess.STDOUT, text=True)
    lines: list[str] = []
    try:
        assert demo.stdout is not None
        deadline = time.monotonic() + 600
        while time.monotonic() < deadline:
            line = demo.stdout.readline()
            if not line:
                break
            lines.append(line.rstrip("\n"))
            if "press Ctrl-C" in line:
                break
        text = "\n".join(lines)
        assert "press Ctrl-C" in text, text
        urls = re.findall(r"^  (kilns|greenhouse): (http://\S+)$", text, re.MULTILINE)
        assert [name for name, _ in urls] == ["kilns", "greenhouse"], text
        for _, url in urls:
            assert "/v1/links/" in url
            page = httpx.get(url, timeout=60)  # no Authorization header
            assert page.status_code == 200 and "<h1>Tuning job" in page.text
            plain = httpx.get(url.split("/v1/links/")[0] + "/v1/jobs/"
                              + url.rsplit("/jobs/", 1)[1], timeout=60)
            assert plain.status_code == 401  # the server has a key: only the link opens it
    finally:
        if demo.poll() is None:
            demo.send_signal(signal.SIGINT)
        try:
            demo.wait(timeout=120)
        except subprocess.TimeoutExpired:
            demo.kill()
            demo.wait()
        assert demo.stdout is not None
        lines += demo.stdout.read().splitlines()  # what it said while stopping
        demo.stdout.close()
    text = "\n".join(lines)
    assert demo.returncode == 0, text

    assert f"server and worker logs: {log}" in text
    assert not [line for line in lines if LOG_LINE.match(line)], text
    assert "Uvicorn running" not in text and "Started server process" not in text
    for what in ("leaderboard (", "  winner: model ", "  prediction for "):
        assert text.count(what) == 2, (what, text)
    progress = [line for line in lines if re.match(r"^  (kilns|greenhouse)\s+\d+/3 trials",
                                                   line)]
    assert progress, text
    # The file holds what the terminal does not: the workers' own lines about the jobs.
    logged = log.read_text()
    assert any(LOG_LINE.match(line) and "grovekeeper" in line for line in logged.splitlines())
