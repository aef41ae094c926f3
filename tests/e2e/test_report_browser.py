"""The report page in a real headless Chromium, against a real server and finished job.

Needs the Debian packages ``chromium`` and ``chromium-driver`` (``.ci/run`` installs them)
and the ``selenium`` package. Outside CI the test skips, naming what is missing; in CI
(``CI=true``) a missing browser is a failure.
"""

from __future__ import annotations

import os
from collections.abc import Iterator
from pathlib import Path

import pytest

from examples.demo_data import kilns
from tests.conftest import ROOT, Server, wait_for_job
from tests.security.attack import create_key

pytestmark = pytest.mark.e2e
CHROMIUM, DRIVER = "/usr/bin/chromium", "/usr/bin/chromedriver"
ARTIFACTS = ROOT / "test-artifacts"


def _browser():  # type: ignore[no-untyped-def]
    missing = [p for p in (CHROMIUM, DRIVER) if not Path(p).exists()]
    try:
        from selenium import webdriver
        from selenium.webdriver.chrome.service import Service
    except ImportError as exc:
        missing.append(f"selenium ({exc})")
    if missing:
        reason = f"headless browser unavailable: missing {', '.join(missing)}"
        if os.environ.get("CI"):
            pytest.fail(reason)
        pytest.skip(reason)
    options = webdriver.ChromeOptions()
    options.binary_location = CHROMIUM
    for flag in ("--headless=new", "--no-sandbox", "--disable-gpu", "--disable-dev-shm-usage",
                 "--disable-background-networking", "--disable-extensions",
                 "--disable-component-update", "--no-first-run", "--window-size=1200,900"):
        options.add_argument(flag)
    # An explicit driver path keeps Selenium Manager from trying to download one.
    return webdriver.Chrome(service=Service(DRIVER), options=options)


@pytest.fixture(scope="module")
def keyed_server(tmp_path_factory: pytest.TempPathFactory) -> Iterator[tuple[Server, dict]]:
    """A server with keys, as every deployment that others reach has: a browser cannot
    send the key, so the report is opened through a signed link."""
    home = tmp_path_factory.mktemp("browser") / "home"
    keys = {scope: create_key(home, scope) for scope in ("read", "admin")}
    server = Server(home=home).start()
    try:
        yield server, keys
    finally:
        server.stop()


@pytest.fixture(scope="module")
def finished_job(keyed_server: tuple[Server, dict]) -> dict:
    server, keys = keyed_server
    frame = kilns(n_rows=300, seed=8)
    with server.client(headers={"Authorization": f"Bearer {keys['admin']}"}) as client:
        up = client.post("/v1/datasets", params={"name": "kilns"},
                         content=frame.to_csv(index=False).encode(),
                         headers={"Content-Type": "text/csv"}).json()
        job = client.post("/v1/jobs", json={"dataset_id": up["id"], "target": "defect",
                                            "budget": {"trials": 4}, "seed": 1}).json()
        job = wait_for_job(client, job["id"])
        board = client.get(f"/v1/jobs/{job['id']}/leaderboard").json()
        # A read key is enough to mint the link.
        link = client.post(f"/v1/jobs/{job['id']}/report-links",
                           headers={"Authorization": f"Bearer {keys['read']}"}).json()["url"]
    assert job["status"] == "succeeded", (job, server.log())
    return {"job": job, "board": board, "link": link}


def test_report_renders_in_chromium(keyed_server: tuple[Server, dict],
                                    finished_job: dict) -> None:
    from selenium.webdriver.common.by import By
    from selenium.webdriver.support.wait import WebDriverWait

    server, _ = keyed_server
    job, board = finished_job["job"], finished_job["board"]
    driver = _browser()
    try:
        # Without the link the browser gets the key problem, not the page.
        driver.get(f"{server.base}/v1/jobs/{job['id']}/report")
        assert job["id"] not in driver.title and "unauthorized" in driver.page_source
        driver.get(finished_job["link"])
        assert job["id"] in driver.title and "succeeded" in driver.title
        rows = driver.find_elements(By.CSS_SELECTOR, "#leaderboard tbody tr")
        assert len(rows) == board["total"]
        first = rows[0].find_elements(By.TAG_NAME, "td")
        assert int(first[1].text) == board["items"][0]["number"]
        images = driver.find_elements(By.CSS_SELECTOR, ".plots img")
        assert [Path(i.get_attribute("src")).stem for i in images] == [
            "history", "hyperparameters", "features", "learning", "calibration", "gains",
            "confusion"]
        for img in images:
            driver.execute_script("arguments[0].scrollIntoView()", img)  # lazy images load
        driver.execute_script("window.scrollTo(0, 0)")
        # An image that failed to load or decode ends complete with naturalWidth 0.
        loaded = "return arguments[0].complete && arguments[0].naturalWidth"
        WebDriverWait(driver, 20).until(
            lambda d: all(d.execute_script(loaded, img) for img in images))
        widths = [driver.execute_script(loaded, img) for img in images]
        assert all(w > 100 for w in widths), widths
        assert driver.find_element(By.ID, "winner").is_displayed()
        ARTIFACTS.mkdir(exist_ok=True)
        height = driver.execute_script("return document.body.scrollHeight")
        driver.set_window_size(1200, min(int(height) + 40, 6000))
        shot = ARTIFACTS / "report.png"
        assert driver.save_screenshot(str(shot)) and shot.stat().st_size > 10_000
        ratio = driver.execute_script("return window.devicePixelRatio")
        board_box = _box(driver, driver.find_element(By.ID, "leaderboard"), ratio)
        history_box = _box(driver, images[0], ratio)
    finally:
        driver.quit()
    _check_screenshot(shot, board_box, history_box, rows=len(rows))


def _box(driver, element, ratio: float) -> tuple[int, int, int, int]:  # type: ignore[no-untyped-def]
    """The element's box on the screenshot (page at the top, device pixels)."""
    rect = driver.execute_script(
        "const r = arguments[0].getBoundingClientRect();"
        "return [r.left, r.top, r.right, r.bottom];", element)
    return tuple(int(round(v * ratio)) for v in rect)  # type: ignore[return-value]


def _near(pixels, colour: str, tolerance: int):  # type: ignore[no-untyped-def]
    """How many pixels lie within ``tolerance`` of ``colour`` on every channel."""
    import numpy as np

    target = np.array([int(colour[i:i + 2], 16) for i in (1, 3, 5)])
    return int((np.abs(pixels.astype(int) - target) <= tolerance).all(axis=-1).sum())


def _check_screenshot(shot: Path, board_box: tuple[int, int, int, int],
                      history_box: tuple[int, int, int, int], *, rows: int) -> None:
    """What a person sees: the leaderboard is drawn (ink on its rows), and the history
    plot is drawn in its own palette (teal trials, plum best line), not the blue and
    orange-red of the other plots' accents."""
    import numpy as np
    from PIL import Image

    from service.report.plots import ACCENT, HISTORY_BEST, HISTORY_TRIAL, WARM

    image = np.asarray(Image.open(shot).convert("RGB"))
    left, top, right, bottom = board_box
    board = image[top:bottom, left:right]
    assert board.shape[1] > 300 and board.shape[0] > 20 * rows, board.shape
    ink = int((board.sum(axis=-1) < 250).sum())
    assert ink > 200 * rows, ink  # text on every row, not an empty box
    left, top, right, bottom = history_box
    history = image[top:bottom, left:right]
    assert history.shape[0] * history.shape[1] > 100_000, history_box
    count = {c: _near(history, c, 24) for c in (HISTORY_TRIAL, HISTORY_BEST, ACCENT, WARM)}
    assert count[HISTORY_TRIAL] > 50 and count[HISTORY_BEST] > 50, count
    assert count[ACCENT] < 10 and count[WARM] < 10, count
