"""Headless Chromium through Selenium for the report's browser test (Debian's chromium + chromium-driver)."""
from __future__ import annotations

import importlib.util
from pathlib import Path

CHROMIUM = Path("/usr/bin/chromium")
CHROMEDRIVER = Path("/usr/bin/chromedriver")
ARTIFACTS = Path(__file__).resolve().parents[1] / "test-artifacts"   # gitignored


def missing_browser() -> str | None:
    """Why the browser test cannot run here, or None when it can."""
    if not CHROMIUM.exists():
        return f"{CHROMIUM} not installed (apt-get install chromium chromium-driver)"
    if not CHROMEDRIVER.exists():
        return f"{CHROMEDRIVER} not installed (apt-get install chromium-driver)"
    if importlib.util.find_spec("selenium") is None:
        return "selenium not installed (pip install 'selenium>=4.15')"
    return None


def start_chromium(user_data_dir: Path, width: int = 1280, height: int = 900):
    """A headless Chromium with a fresh profile, no network chatter of its own, console logs kept."""
    from selenium import webdriver
    from selenium.webdriver.chrome.service import Service

    options = webdriver.ChromeOptions()
    options.binary_location = str(CHROMIUM)
    for flag in ("--headless=new", "--no-sandbox", "--disable-gpu", "--disable-background-networking",
                 "--disable-component-update", "--disable-sync", "--no-first-run", "--disable-dev-shm-usage",
                 f"--user-data-dir={user_data_dir}", f"--window-size={width},{height}"):
        options.add_argument(flag)
    options.set_capability("goog:loggingPrefs", {"browser": "ALL"})
    return webdriver.Chrome(service=Service(executable_path=str(CHROMEDRIVER)), options=options)


def severe_console_entries(driver) -> list[dict]:
    return [entry for entry in driver.get_log("browser") if entry.get("level") == "SEVERE"]


def full_page_screenshot(driver, path: Path, width: int) -> Path:
    """The whole page at `width` CSS pixels: the window is made as tall as the document."""
    driver.set_window_size(width, 900)
    driver.execute_script("window.scrollTo(0, 0);")
    height = driver.execute_script("return document.documentElement.scrollHeight;")
    driver.set_window_size(width, min(int(height) + 120, 16000))
    path.parent.mkdir(parents=True, exist_ok=True)
    driver.save_screenshot(str(path))
    return path

