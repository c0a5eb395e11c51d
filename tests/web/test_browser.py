"""The web page driven in headless Chromium (Selenium), over the demo library.

What a designer does: rank the demo parts at 5 V, open a part, compare three parts, download a
SPICE model. Independent truths: the ranking against each part's stored curves evaluated one by
one (fits.Curve, the mean of a part's curves at 25 degC, the query's documented pooling); the
downloaded model against the CLI's export of the same curve. Screenshots of the ranking, part
and compare pages are written to out/screenshots (PNG signature checked).
"""

from __future__ import annotations

import time
from pathlib import Path

import numpy as np
import pytest

from benchkit.library import Library

pytestmark = pytest.mark.slow

SHOTS = Path(__file__).resolve().parents[2] / "out" / "screenshots"
PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"


def _shot(driver, name: str) -> Path:
    SHOTS.mkdir(parents=True, exist_ok=True)
    path = SHOTS / f"{name}.png"
    png = driver.get_screenshot_as_png()
    assert png.startswith(PNG_SIGNATURE) and len(png) > 10_000
    path.write_bytes(png)
    return path


def _truth_order(lib_path, bias_V=5.0, temp_C=25.0):
    """Parts by the mean C(bias) of their curves at temp_C that reach the bias, largest first;
    per part the first origin that has such curves (measured before supplier claim)."""
    with Library(lib_path) as lib:
        means = {}
        for part in lib.parts():
            recs = [r for r in lib.curves(part.part_id)
                    if r.valid_range_V[0] <= bias_V <= r.valid_range_V[1] and abs(r.temp_C - temp_C) <= 2.0]
            for origin in ("lot summary", "measured", "supplier claim"):
                values = [float(r.curve.C(bias_V)) for r in recs if r.origin == origin]
                if values:
                    means[part.part_id] = float(np.mean(values))
                    break
    return sorted(means, key=lambda p: -means[p])


def _images_loaded(driver, timeout_s=30.0) -> bool:
    deadline = time.monotonic() + timeout_s
    script = "return Array.from(document.images).every(i => i.complete && i.naturalWidth > 0);"
    while time.monotonic() < deadline:
        if driver.execute_script(script):
            return True
        time.sleep(0.1)
    return False


def _click_and_wait(driver, element, timeout_s=30.0) -> None:
    """Click a link or submit button and wait until the next page has replaced this one.

    A click only starts the navigation; reading the DOM straight after it can still see the old
    page (what a slow shared machine showed), so wait for the old root to go stale and the new
    document to finish loading (Selenium's documented explicit-wait pattern)."""
    from selenium.webdriver.common.by import By
    from selenium.webdriver.support.ui import WebDriverWait

    old_root = driver.find_element(By.TAG_NAME, "html")
    element.click()
    wait = WebDriverWait(driver, timeout_s)
    wait.until(_replaced(old_root))
    wait.until(lambda drv: drv.execute_script("return document.readyState") == "complete")


def _replaced(element):
    """Selenium's staleness_of, also taking chromedriver's other answer for a node of a
    replaced document ('Node with given id does not belong to the document', an unknown
    error instead of a stale element reference: SeleniumHQ/selenium issue 15401) as stale."""
    from selenium.common.exceptions import StaleElementReferenceException, WebDriverException

    def gone(_driver) -> bool:
        try:
            element.is_enabled()
        except StaleElementReferenceException:
            return True
        except WebDriverException as exc:
            if "does not belong to the document" in str(exc):
                return True
            raise
        return False

    return gone


def test_rank_compare_part_and_spice_download(chromium, demo_site, demo_library, tmp_path):
    from selenium.webdriver.common.by import By

    from benchkit.cli import main

    d = chromium
    d.get(demo_site.url + "/")
    bias = d.find_element(By.ID, "bias")
    bias.clear()
    bias.send_keys("5")
    temp = d.find_element(By.ID, "temp")
    temp.clear()
    temp.send_keys("25")
    _click_and_wait(d, d.find_element(By.ID, "rank"))
    ranked = [a.text for a in d.find_elements(By.CSS_SELECTOR, "#ranking a.part-link")]
    truth = _truth_order(demo_library)
    assert len(truth) >= 3 and ranked == truth
    with Library(demo_library) as lib:
        assert set(ranked) <= {p.part_id for p in lib.parts()}
    _shot(d, "ranking")

    # compare the three parts that keep the most capacitance at 5 V
    boxes = d.find_elements(By.CSS_SELECTOR, "#ranking input[type=checkbox]")
    for box in boxes[:3]:
        box.click()
    _click_and_wait(d, d.find_element(By.ID, "compare"))
    compared = [a.text for a in d.find_elements(By.CSS_SELECTOR, "#compared a")]
    assert compared == ranked[:3]
    assert d.find_element(By.ID, "compare-F").is_displayed() and d.find_element(By.ID, "compare-pct").is_displayed()
    assert _images_loaded(d)
    _shot(d, "compare")

    # the best part's page, its plot, and a SPICE model of its first curve
    _click_and_wait(d, d.find_element(By.CSS_SELECTOR, "#compared a"))
    assert d.find_element(By.ID, "part-id").text == ranked[0]
    assert _images_loaded(d)
    _shot(d, "part")
    link = d.find_element(By.CSS_SELECTOR, "#curves a.download[data-format=spice]")
    cid = int(link.get_attribute("href").split("curve=")[1].split("&")[0])
    link.click()
    deadline = time.monotonic() + 30
    files: list[Path] = []
    while time.monotonic() < deadline:
        files = [p for p in d.downloads.iterdir() if p.suffix == ".lib"]
        if files:
            break
        time.sleep(0.1)
    assert len(files) == 1 and files[0].name.endswith(f"_c{cid}.lib")
    cli_out = tmp_path / "cli.lib"
    assert main(["library", "--library", str(demo_library), "export", ranked[0], "--curve", str(cid),
                 "--format", "spice", "--out", str(cli_out)]) == 0
    body = [ln for ln in files[0].read_text().splitlines() if not ln.startswith("*")]  # comments name the source
    assert body == [ln for ln in cli_out.read_text().splitlines() if not ln.startswith("*")]
    assert any(ln.lower().startswith(".subckt") for ln in body) and any(ln.lower().startswith(".ends") for ln in body)

    # the part with a supplier claim and a verification report filed (the demo's BD-1004)
    d.get(demo_site.url + "/part?id=BD-1004")
    origins = {td.text for td in d.find_elements(By.CSS_SELECTOR, "#curves tr td:nth-child(2)")}
    assert {"measured", "supplier claim"} <= origins
    verdicts = d.find_elements(By.CSS_SELECTOR, "#verdicts tr td:nth-child(2)")
    assert verdicts and verdicts[0].text in ("conforming", "nonconforming", "not decidable")
    assert _images_loaded(d)
    _shot(d, "part-with-claim")
    _click_and_wait(d, d.find_element(By.CSS_SELECTOR, "#verdicts a"))
    assert "Lot verdict" in d.page_source
