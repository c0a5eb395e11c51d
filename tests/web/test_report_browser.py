"""The HTML verification report opened in headless Chromium (Selenium), as a reader opens the
file: its identity block and its verdict are on the page, the plots load.

The report is made the way the README makes it: the demo plan swept on the simulated bench,
then `benchkit verify` against the invented supplier claim. Outside truths: the claim file's
and the run files' sha256 recomputed with hashlib (FIPS 180-4); the run id and the *IDN?
answers as run.json recorded them; the verdict as report.json states it.
"""

from __future__ import annotations

import hashlib
import json
from pathlib import Path

import pytest

from benchkit.cli import main

DATA = Path(__file__).resolve().parents[2] / "data"

pytestmark = pytest.mark.slow

OPERATOR = "R. Fenwick (invented)"


@pytest.fixture(scope="module")
def demo_report(tmp_path_factory):
    out = tmp_path_factory.mktemp("report-browser")
    run = out / "run"
    assert main(["measure", "--sim", "--virtual-clock", "--plan", str(DATA / "plans" / "demo.toml"),
                 "--out", str(run)]) == 0
    claim = DATA / "claims" / "BD-1004-typical.csv"
    code = main(["verify", "--claim", str(claim), str(run), "--out", str(out / "report"),
                 "--operator", OPERATOR])
    assert code in (0, 1, 3)
    return out / "report", run, claim


def test_report_page_shows_identity_and_verdict(chromium, demo_report):
    from selenium.webdriver.common.by import By

    report, run, claim = demo_report
    doc = json.loads((report / "report.json").read_text(encoding="utf-8"))
    meta = json.loads((run / "run.json").read_text(encoding="utf-8"))
    d = chromium
    d.get((report / "report.html").resolve().as_uri())
    assert d.title == "benchkit verification: BD-1004"

    verdict = d.find_element(By.ID, "verdict").text
    assert verdict.startswith(f"Lot verdict: {doc['verdict']}")
    per_sample = [e.text for e in d.find_elements(By.CSS_SELECTOR, "h3 span")]
    assert per_sample == [s["verdict"] for s in doc["samples"]] and per_sample

    block = d.find_element(By.ID, "identity")
    assert block.is_displayed()
    rows = {r.find_element(By.TAG_NAME, "th").text: r.find_element(By.TAG_NAME, "td").text
            for r in block.find_elements(By.TAG_NAME, "tr")}
    assert d.find_element(By.ID, "report-id").text == doc["identity"]["report_id"]
    assert rows["report date (UTC)"] == doc["identity"]["report_utc"]
    assert rows["operator"] == f"{OPERATOR} (given with --operator)"
    assert rows["software"].startswith("benchkit ")
    assert rows["run ids"] == meta["run_id"]
    for role, inst in meta["instruments"].items():
        assert f"{role}: {inst['idn']}" in rows[f"instruments of {meta['run_id']}"]
    for label, path in (("sha256 of claim", claim), ("sha256 of run.json", run / "run.json"),
                        ("sha256 of points.csv", run / "points.csv")):
        assert rows[label].startswith(hashlib.sha256(path.read_bytes()).hexdigest())

    loaded = d.execute_script("return Array.from(document.images).map(i => i.complete && i.naturalWidth > 0);")
    assert loaded == [True, True]  # both plots, inline
