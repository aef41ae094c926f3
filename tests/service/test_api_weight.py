"""The API process does no heavy work and loads no heavy library until a request needs it.

Importing the app must not load Optuna, scikit-learn, LightGBM, matplotlib, pandas or
NumPy (checked in a fresh interpreter's ``sys.modules``), and a real ``grovekeeper serve
--workers 0``, started and ready but not yet asked anything, must stay under 150 MiB of
resident memory (read from ``/proc/PID/status``, the kernel's own count).
"""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import pytest

from tests.conftest import ROOT, Server

HEAVY = ("optuna", "sklearn", "lightgbm", "matplotlib", "pandas", "numpy", "scipy", "pyarrow")
IDLE_LIMIT_MIB = 150


def _loaded_after(statement: str) -> list[str]:
    code = (f"import json, sys\n{statement}\n"
            f"print(json.dumps(sorted(m for m in {list(HEAVY)!r} if m in sys.modules)))")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                         cwd=ROOT, check=True)
    return json.loads(out.stdout.strip().splitlines()[-1])


def test_importing_the_app_loads_no_heavy_library() -> None:
    assert _loaded_after("import service.api.app") == []


def test_the_check_can_see_a_heavy_import() -> None:
    """The same check sees them when something does load them (so it can fail)."""
    loaded = _loaded_after("import service.api.app, service.jobspec")
    assert {"lightgbm", "numpy", "optuna", "pandas"} <= set(loaded)


def test_an_upload_loads_no_training_library(tmp_path: Path) -> None:
    """Parsing, profiling and storing an upload (what the API process does with one) needs
    pandas and pyarrow, never the training or plotting libraries."""
    body = tmp_path / "kilns.csv"
    body.write_text("peak_temp_c,clay_body,defect\n1240,raku,0\n1180,stoneware,1\n"
                    "1240,raku,0\n")
    loaded = _loaded_after(
        "from pathlib import Path\n"
        "from service.api.ingest import Received, parse_and_store\n"
        f"received = Received(path=Path({str(body)!r}), size=1, sha256='', fmt='csv', "
        "name='k')\n"
        f"parsed = parse_and_store(received, Path({str(tmp_path)!r}) / 'out.parquet')\n"
        "assert parsed.rows == 3 and any('duplicates' in w for w in parsed.warnings), "
        "parsed.warnings")
    assert {"pandas", "pyarrow"} <= set(loaded)
    assert not {"optuna", "sklearn", "lightgbm", "matplotlib", "scipy"} & set(loaded)


def test_arrow_memory_setting_comes_before_pyarrow_loads() -> None:
    # serve and worker set it first thing; pyarrow's allocator reads it when pyarrow loads.
    code = ("import os, sys\n"
            "from service.memory import arrow_returns_memory, ARROW_JEMALLOC_CONF\n"
            "import service.cli, service.api.app\n"
            "assert 'pyarrow' not in sys.modules\n"
            "assert arrow_returns_memory()\n"
            "assert os.environ['JE_ARROW_MALLOC_CONF'] == ARROW_JEMALLOC_CONF\n"
            "del os.environ['JE_ARROW_MALLOC_CONF']\n"
            "import pyarrow\n"
            "assert not arrow_returns_memory()  # too late once pyarrow is loaded\n")
    subprocess.run([sys.executable, "-c", code], cwd=ROOT, check=True)


def _rss_mib(pid: int) -> float:
    for line in Path(f"/proc/{pid}/status").read_text().splitlines():
        if line.startswith("VmRSS:"):
            return int(line.split()[1]) / 1024
    raise AssertionError("no VmRSS line")


@pytest.mark.e2e
def test_idle_api_process_stays_small(tmp_path: Path) -> None:
    server = Server(home=tmp_path / "home", workers=0).start()  # returns once /readyz is 200
    try:
        assert server.proc is not None
        rss = _rss_mib(server.proc.pid)
        assert rss < IDLE_LIMIT_MIB, f"idle API process holds {rss:.0f} MiB"
        with server.client() as client:
            assert client.get("/healthz").status_code == 200
    finally:
        server.stop()
