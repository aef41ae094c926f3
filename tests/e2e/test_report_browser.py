"""The report page in a real headless Chromium, against a real server and finished job.

Needs the Debian packages ``chromium`` and ``chromium-driver`` (``.ci/run`` installs them)
and the ``selenium`` package. Outside CI the test skips, naming what is missing; in CI
(``CI=true``) a missing browser is a failure.
"""

from __future__ import annotations

import os
from pathlib import Path

import pytest

from examples.demo_data import kilns
from tests.conftest import ROOT, Server, wait_for_job

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
def finished_job(server: Server) -> dict:
    frame = kilns(n_rows=300, seed=8)
    with server.client() as client:
        up = client.post("/v1/datasets", params={"name": "kilns"},
                         content=frame.to_csv(index=False).encode(),
                         headers={"Content-Type": "text/csv"}).json()
        job = client.post("/v1/jobs", json={"dataset_id": up["id"], "target": "defect",
                                            "budget": {"trials": 4}, "seed": 1}).json()
        job = wait_for_job(client, job["id"])
        board = client.get(f"/v1/jobs/{job['id']}/leaderboard").json()
    assert job["status"] == "succeeded", (job, server.log())
    return {"job": job, "board": board}


def test_report_renders_in_chromium(server: Server, finished_job: dict) -> None:
    from selenium.webdriver.common.by import By
    from selenium.webdriver.support.wait import WebDriverWait

    job, board = finished_job["job"], finished_job["board"]
    driver = _browser()
    try:
        driver.get(f"{server.base}/v1/jobs/{job['id']}/report")
        assert job["id"] in driver.title and "succeeded" in driver.title
        rows = driver.find_elements(By.CSS_SELECTOR, "#leaderboard tbody tr")
        assert len(rows) == board["count"]
        first = rows[0].find_elements(By.TAG_NAME, "td")
        assert int(first[1].text) == board["data"][0]["number"]
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
    finally:
        driver.quit()
