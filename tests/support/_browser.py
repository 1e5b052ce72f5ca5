"""Headless Debian Chromium driven by selenium through chromedriver (browser tests).

A test that needs the browser calls :func:`chromium` . Without a chromium binary
the test is skipped with the reason, unless CI is set: in CI (where .ci/run
installs Debian's chromium and chromium-driver) a missing browser fails.
"""
import base64
import contextlib
import io
import os
import shutil
import tempfile

import pytest
from PIL import Image

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


PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"  # the PNG specification (ISO/IEC 15948), section 5.2


def check_images(driver, expected_ids):
    """Each ``figure#plot-<id>`` image is there, loaded, and a PNG that decodes in full."""
    images = driver.execute_script(IMAGES_JS)
    by_id = {i["id"]: i for i in images}
    for plot in expected_ids:
        img = by_id.get(f"plot-{plot}")
        assert img is not None, f"plot {plot} missing; images: {[i['id'] for i in images]}"
        assert img["complete"] and img["width"] > 0 and img["height"] > 0, img["id"]
        assert img["src"].startswith("data:image/png;base64,")
        data = base64.b64decode(img["src"].split(",", 1)[1])
        assert data[:8] == PNG_SIGNATURE
        with Image.open(io.BytesIO(data)) as im:
            im.verify()                          # a full decode of the PNG's chunks
            assert im.size == (img["width"], img["height"])
    return images
