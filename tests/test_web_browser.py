"""``benchrun serve`` in a real headless browser: Chromium and its driver from Debian's
packages, driven by selenium. Sign in, open a lot and a shot's waveform, verify the report,
see a tampered upload rejected, and watch a live run of the simulated bench advance."""

from __future__ import annotations

import shutil
import subprocess
import sys
import threading
import time
from pathlib import Path

import pytest
from web_helpers import PASSWORD, web_site  # noqa: F401 - fixture

from benchrun.web import WebConfig, create_app

ROOT = Path(__file__).resolve().parents[1]
CHROMEDRIVER = shutil.which("chromedriver")
CHROMIUM = shutil.which("chromium")

pytestmark = pytest.mark.skipif(
    CHROMEDRIVER is None or CHROMIUM is None,
    reason="needs Debian's chromium and chromium-driver (scripts/install-test-deps.sh)")


@pytest.fixture(scope="module")
def site(web_site, tmp_path_factory):  # noqa: F811
    from werkzeug.serving import make_server

    # a private copy: the live run below adds a run folder to it
    root = web_site.copy(tmp_path_factory.mktemp("browser-site"))
    app = create_app(WebConfig(results=str(root), users=web_site.users,
                               trusted_certs=[web_site.cert], verify_in_background=False))
    server = make_server("127.0.0.1", 0, app, threaded=True)
    thread = threading.Thread(target=server.serve_forever, daemon=True)
    thread.start()
    yield (f"http://127.0.0.1:{server.server_port}", web_site, tmp_path_factory.mktemp("shots"),
           root)
    server.shutdown()
    thread.join(5)


@pytest.fixture(scope="module")
def browser():
    from selenium import webdriver
    from selenium.webdriver.chrome.service import Service

    options = webdriver.ChromeOptions()
    options.binary_location = CHROMIUM
    for arg in ("--headless=new", "--no-sandbox", "--disable-gpu", "--disable-dev-shm-usage",
                "--window-size=1280,1000"):
        options.add_argument(arg)
    driver = webdriver.Chrome(service=Service(CHROMEDRIVER), options=options)
    driver.set_page_load_timeout(30)
    yield driver
    driver.quit()


def _wait(condition, timeout=20.0, step=0.2):
    end = time.monotonic() + timeout
    while time.monotonic() < end:
        value = condition()
        if value:
            return value
        time.sleep(step)
    raise AssertionError("timed out waiting")


def _sign_in(browser, base, name="eng"):
    from selenium.webdriver.common.by import By

    browser.delete_all_cookies()
    browser.get(base + "/")
    assert "/login" in browser.current_url
    browser.find_element(By.ID, "name").send_keys(name)
    browser.find_element(By.ID, "password").send_keys(PASSWORD)
    browser.find_element(By.ID, "sign-in").click()
    _wait(lambda: browser.find_elements(By.ID, "lots"))


def test_sign_in_lot_waveform_verify(site, browser):
    from selenium.webdriver.common.by import By

    base, _web, shots, _root = site
    _sign_in(browser, base)
    browser.save_screenshot(str(shots / "lots.png"))
    browser.find_element(By.CLASS_NAME, "lotlink").click()
    _wait(lambda: browser.find_elements(By.ID, "devices"))
    assert "non-conforming" in browser.page_source
    browser.find_element(By.CSS_SELECTOR, "a.shot").click()
    image = _wait(lambda: browser.find_elements(By.ID, "waveform"))[0]
    assert _wait(lambda: browser.execute_script(
        "return arguments[0].complete && arguments[0].naturalWidth", image)) > 400
    browser.save_screenshot(str(shots / "shot.png"))
    browser.back()
    _wait(lambda: browser.find_elements(By.ID, "verify"))[0].click()
    verdict = _wait(lambda: browser.find_elements(By.ID, "verdict-text"), timeout=60)[0]
    assert verdict.text == "VERIFIED: every check holds."
    checks = browser.find_elements(By.CSS_SELECTOR, "#checks > li")
    assert len(checks) >= 4
    assert len(browser.find_elements(By.CSS_SELECTOR, "#checks > li.ok")) == len(checks)


def test_tampered_upload_rejected(site, browser, tmp_path):
    from selenium.webdriver.common.by import By

    base, web, _shots, _root = site
    _sign_in(browser, base, "ada")
    bad = bytearray(web.signed.pdf.read_bytes())
    bad[len(bad) // 2] ^= 0x10
    tampered = tmp_path / "supplier-report.pdf"
    tampered.write_bytes(bytes(bad))
    browser.get(base + "/check")
    browser.find_element(By.ID, "report-file").send_keys(str(tampered))
    browser.find_element(By.ID, "cert-file").send_keys(str(web.cert))
    browser.find_element(By.ID, "check-button").click()
    verdict = _wait(lambda: browser.find_elements(By.ID, "verdict-text"), timeout=60)[0]
    assert verdict.text == "NOT VERIFIED."
    failed = [li.text for li in browser.find_elements(By.CSS_SELECTOR, "#checks > li.bad")]
    assert any("signature intact" in text for text in failed)


def test_live_run_of_the_simulated_bench_advances(site, browser):
    from selenium.webdriver.common.by import By

    base, _web, shots, root = site
    out = root / "live-runs"
    process = subprocess.Popen(
        [sys.executable, "-m", "benchrun.cli", "run", str(ROOT / "sequences/dx4417-demo.yaml"),
         "--bench", str(ROOT / "sequences/bench-sim.yaml"), "--out", str(out),
         "--no-progress", "--sim-speedup", "30"],
        stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, cwd=ROOT)
    try:
        _sign_in(browser, base, "eng")

        def run_link():
            browser.get(base + "/live")
            return browser.find_elements(By.CSS_SELECTOR, "#live-runs a")

        _wait(run_link, timeout=60, step=1.0)[0].click()
        done = _wait(lambda: browser.find_elements(By.ID, "done"))[0]
        seen = {int(done.text)}
        end = time.monotonic() + 90
        while time.monotonic() < end:
            seen.add(int(browser.find_element(By.ID, "done").text))
            if browser.find_element(By.ID, "state").text != "running" or len(seen) >= 3:
                break
            time.sleep(0.5)
        assert len(seen) >= 2, seen  # the page advanced without a reload
        _wait(lambda: browser.execute_script(
            "var i = document.getElementById('last-waveform'); "
            "return i.complete && i.naturalWidth"), timeout=30)
        _wait(lambda: browser.find_elements(By.CSS_SELECTOR, "#events li"), timeout=30)
        browser.save_screenshot(str(shots / "live.png"))
    finally:
        _out, err = process.communicate(timeout=120)
    assert process.returncode == 0, err.decode()
