"""Headless Debian Chromium driven by selenium through chromedriver (browser tests).

A test that needs the browser calls :func:`chromium` . Without a chromium binary
the test is skipped with the reason, unless CI is set: in CI (where .ci/run
installs Debian's chromium and chromium-driver) a missing browser fails.
"""
import contextlib
import os
import shutil
import tempfile

import pytest

FLAGS = ("--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
         "--disable-background-networking", "--disable-component-update", "--disable-sync",
         "--window-size=1280,2000")


def _find(*names):
    for name in names:
        path = shutil.which(name)
        if path:
            return path
    return None


@contextlib.contextmanager
def chromium():
    """A selenium WebDriver for headless Chromium with a fresh profile; quit on exit."""
    binary = _find("chromium", "chromium-browser")
    driver_path = _find("chromedriver")
    if binary is None or driver_path is None:
        missing = "chromium" if binary is None else "chromedriver"
        if os.environ.get("CI"):
            pytest.fail(f"CI is set but {missing} is not installed; .ci/run installs Debian's "
                        "chromium and chromium-driver")
        pytest.skip(f"{missing} is not installed (apt-get install chromium chromium-driver); "
                    "CI is not set")
    from selenium import webdriver
    from selenium.webdriver.chrome.service import Service

    profile = tempfile.mkdtemp(prefix="shoal-chromium-")
    options = webdriver.ChromeOptions()
    options.binary_location = binary
    for flag in FLAGS:
        options.add_argument(flag)
    options.add_argument(f"--user-data-dir={profile}")
    options.set_capability("goog:loggingPrefs", {"browser": "ALL"})
    driver = webdriver.Chrome(options=options, service=Service(executable_path=driver_path))
    driver.set_page_load_timeout(60)
    try:
        yield driver
    finally:
        driver.quit()
        shutil.rmtree(profile, ignore_errors=True)


IMAGES_JS = """
return Array.from(document.images).map(img => ({
  id: img.closest('figure') ? img.closest('figure').id : null,
  complete: img.complete, width: img.naturalWidth, height: img.naturalHeight,
  src: img.src}));
"""


def console_errors(driver):
    """Console entries at level SEVERE (errors) since the last call."""
    return [e for e in driver.get_log("browser") if e.get("level") == "SEVERE"]
