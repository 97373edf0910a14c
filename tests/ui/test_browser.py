"""The console in a real headless Chromium (Debian's chromium + chromedriver, driven by
Selenium), against the real service over HTTP with a real ``likewise worker``.

Fits two versions of an iris metric (Fisher 1936, scikit-learn's bundled copy), signs
in, checks the plots are inline SVG, rolls back through the dialog with a reason and
checks the API and the page agree on the new serving version and history. Screenshots
go to ``var/artifacts/console/`` (printed; ``make test`` keeps them). The Makefile's
``browser`` step installs chromium; where it could not, this test is skipped.
"""

from __future__ import annotations

import os
from collections.abc import Iterator
from pathlib import Path

import pytest

from tests.api.helpers import IRIS_FEATURES, as_records, iris_batches
from tests.client.conftest import ROOT, Live

CHROMIUM, DRIVER = Path("/usr/bin/chromium"), Path("/usr/bin/chromedriver")
ARTIFACTS = Path(os.environ.get("LIKEWISE_ARTIFACTS", ROOT / "var" / "artifacts")) / "console"
WAIT = 60  # seconds, the bound on every wait for the page

pytestmark = pytest.mark.skipif(
    not (CHROMIUM.exists() and DRIVER.exists()),
    reason="chromium/chromedriver missing (make test installs them: scripts/browser.sh)")


@pytest.fixture
def browser() -> Iterator[object]:
    from selenium import webdriver
    from selenium.webdriver.chrome.service import Service

    options = webdriver.ChromeOptions()
    options.binary_location = str(CHROMIUM)
    for arg in ("--headless=new", "--no-sandbox", "--disable-dev-shm-usage",
                "--disable-gpu", "--window-size=1440,1000", "--force-device-scale-factor=1"):
        options.add_argument(arg)
    driver = webdriver.Chrome(service=Service(executable_path=str(DRIVER)), options=options)
    try:
        yield driver
    finally:
        driver.quit()


def _shoot(driver, name: str) -> Path:
    """A PNG of the whole page, beyond the window (Chromium's DevTools protocol)."""
    import base64

    shot = driver.execute_cdp_cmd("Page.captureScreenshot",
                                  {"format": "png", "captureBeyondViewport": True})
    ARTIFACTS.mkdir(parents=True, exist_ok=True)
    path = ARTIFACTS / name
    path.write_bytes(base64.b64decode(shot["data"]))
    print(f"console screenshot: {path}")
    return path


def _two_versions(live: Live, name: str) -> None:
    """Version 1 from four batches, version 2 (always activated) from six, then one
    more batch that neither saw (the projection's held-out batch)."""
    client = live.client()
    client.put_metric(name, IRIS_FEATURES, "iris (Fisher 1936), scikit-learn's copy")
    batches = iris_batches(7, seed=3)

    def post(chunk) -> None:
        for X, y in chunk:
            client.post_batch(name, as_records(X), [f"g{v}" for v in y])

    post(batches[:4])
    first = client.wait_for_fit(client.start_fit(name)["fit_id"], timeout=240)
    assert first["status"] == "succeeded" and first["version"] == 1, first
    post(batches[4:6])
    second = client.wait_for_fit(
        client.start_fit(name, method="diagonal", activate="at_once")["fit_id"], timeout=240)
    assert second["status"] == "succeeded" and second["version"] == 2, second
    post(batches[6:])
    X, _ = batches[0]
    client.group(name, as_records(X), 3)  # something for the drift panel


def test_roll_back_from_the_console(live: Live, metric_name: str, browser) -> None:
    from selenium.webdriver.common.by import By
    from selenium.webdriver.support import expected_conditions as ec
    from selenium.webdriver.support.ui import WebDriverWait

    _two_versions(live, metric_name)
    driver, wait = browser, WebDriverWait(browser, WAIT)
    driver.get(f"{live.url}/console/")
    driver.find_element(By.ID, "token").send_keys(live.token)
    driver.find_element(By.CSS_SELECTOR, "#sign-in-form button[type=submit]").click()
    chip = wait.until(ec.element_to_be_clickable(
        (By.CSS_SELECTOR, f'.chip[data-metric="{metric_name}"]')))
    assert live.token not in driver.current_url
    assert driver.execute_script(
        "return sessionStorage.getItem('likewise.console.token')") == live.token
    chip.click()
    board = f'#metric:not([data-loading]) #metric-board[data-name="{metric_name}"]'
    wait.until(ec.presence_of_element_located((By.CSS_SELECTOR, f'{board}[data-active="2"]')))

    # the three plots are inline SVG; the bars are keyed by feature name
    for plot in ("versions", "weights", "margins", "projection"):
        svg = driver.find_elements(By.CSS_SELECTOR, f"#plot-{plot} svg")
        assert len(svg) == 1, plot
        assert svg[0].size["width"] > 200 and svg[0].size["height"] > 100, plot
    weights = driver.find_element(By.CSS_SELECTOR, "#plot-weights svg").text
    assert all(f in weights for f in IRIS_FEATURES), weights
    assert "not used to fit version 2" in driver.find_element(By.ID, "plot-projection").text
    # the queue: a worker with its last heartbeat
    workers = driver.find_element(By.CSS_SELECTOR, "#queue table.workers").text
    assert f"{live.settings.key_prefix}-worker" in workers and " ago" in workers
    _shoot(driver, "before-rollback.png")

    # roll back with a reason
    button = driver.find_element(By.ID, "rollback-open")
    assert button.text == "Roll back to version 1"
    button.click()
    dialog = wait.until(ec.visibility_of_element_located((By.ID, "rollback")))
    assert "version 1" in dialog.text
    reason = "version 2 groups the new intake worse (console test)"
    driver.find_element(By.ID, "reason").send_keys(reason)
    driver.find_element(By.ID, "rollback-confirm").click()
    wait.until(ec.presence_of_element_located((By.CSS_SELECTOR, f'{board}[data-active="1"]')))
    assert driver.find_element(By.ID, "serving").text == "version 1 serving"

    # the API agrees: version 1 serves and the history names the roll-back
    client = live.client()
    active = [v["version"] for v in client.list_versions(metric_name) if v["active"]]
    assert active == [1]
    last = client.history(metric_name)[-1]
    assert (last["from"], last["to"], last["reason"], last["who"]) == (2, 1, reason, "admin")
    # and so does the page
    entry = driver.find_element(By.CSS_SELECTOR, '#history li[data-from="2"][data-to="1"]')
    assert reason in entry.text
    assert "version 1 serves again" in driver.find_element(By.ID, "notice").text
    assert driver.find_element(By.ID, "rollback-open").text == "Roll back to version 2"
    _shoot(driver, "after-rollback.png")

    # forgetting the token clears it from the tab
    driver.find_element(By.ID, "sign-out").click()
    assert driver.execute_script(
        "return sessionStorage.getItem('likewise.console.token')") is None
    assert driver.find_element(By.ID, "sign-in").is_displayed()
