"""Libraries, a live server and headless Chromium for the web tests.

The small library is invented (parts BD-31xx of Brackwater Dynamics, tanh-shaped curves with
made-up numbers). The demo library is built the way `make demo` builds it: the demo fixture
swept on the simulated bench, fitted and filed with the demo catalogue (data/parts.toml) and
the invented supplier claim, plus the verification report of that claim.
"""

from __future__ import annotations

import shutil
import socket
import threading
import time
from pathlib import Path

import numpy as np
import pytest

ROOT = Path(__file__).resolve().parents[2]
DATA = ROOT / "data"
CHROMEDRIVER = "/usr/bin/chromedriver"

SMALL_PARTS = [
    {"id": "BD-3101", "description": "10 uF 6.3 V X5R 0402", "nominal_C_F": 10e-6, "rated_V": 6.3,
     "class_code": "X5R", "case": "0402", "tolerance": "M"},
    {"id": "BD-3102", "description": "10 uF 16 V X7R 0805", "nominal_C_F": 10e-6, "rated_V": 16.0,
     "class_code": "X7R", "case": "0805", "tolerance": "K"},
    {"id": "BD-3103", "description": "4.7 uF 25 V X7R 1206", "nominal_C_F": 4.7e-6, "rated_V": 25.0,
     "class_code": "X7R", "case": "1206", "tolerance": "K"},
    {"id": "BD-3104", "description": "22 uF 10 V X5R 0805", "nominal_C_F": 22e-6, "rated_V": 10.0,
     "class_code": "X5R", "case": "0805", "tolerance": "M"},
]
# invented tanh parameters per part: (C_pk_F, C_inf_F, V0_V)
SMALL_CURVES = {"BD-3101": (10e-6, 1.0e-6, 2.0), "BD-3102": (10e-6, 2.0e-6, 8.0),
                "BD-3103": (4.7e-6, 1.5e-6, 15.0), "BD-3104": (22e-6, 1.5e-6, 2.5)}


def small_curve(part_id: str, sample_id: str = "S1", scale: float = 1.0):
    from fits import Curve

    c_pk, c_inf, v0 = SMALL_CURVES[part_id]
    params = {"C_inf_F": c_inf * scale, "C_pk_F": c_pk * scale, "V0_V": v0, "V_off_V": 0.0}
    rated = next(p["rated_V"] for p in SMALL_PARTS if p["id"] == part_id)
    cov = np.diag([(0.01 * abs(v)) ** 2 if v else 1e-6 for v in params.values()])
    return Curve("tanh", params, cov, (0.0, rated),
                 conditions={"freq_Hz": 1000.0, "ac_level_Vrms": 1.0, "temp_C": 25.0, "function": "CPD"},
                 source={"run_id": None, "sample_id": sample_id, "part_id": part_id, "branch": "rising",
                         "points_sha256": None},
                 origin="measured", part_id=part_id, sample_id=sample_id, branch="rising",
                 param_names=list(params))


@pytest.fixture
def make_small_curve():
    return small_curve


@pytest.fixture(params=["sqlite", "postgresql"])
def small_library(request, tmp_path):
    """The invented library, on each backend in turn; returns its target (path or URL)."""
    from benchkit.library import Library

    target = str(tmp_path / "small.sqlite") if request.param == "sqlite" else request.getfixturevalue("postgres_url")
    with Library(target) as lib:
        lib.add_parts(SMALL_PARTS)
        for pid in SMALL_CURVES:
            lib.add_curve(small_curve(pid, "S1"))
            lib.add_curve(small_curve(pid, "S2", scale=0.98))
    return target


@pytest.fixture(scope="session")
def demo_library(tmp_path_factory) -> Path:
    """The demo parts swept, fitted and filed as `make demo` does (one sweep, once per session)."""
    from benchkit.cli import main

    out = tmp_path_factory.mktemp("webdemo")
    run = out / "run-fixture"
    lib = out / "library.sqlite"
    steps = [
        ["measure", "--sim", "--virtual-clock", "--plan", str(DATA / "plans" / "demo.toml"), "--out", str(run)],
        ["library", "--library", str(lib), "add-parts", str(DATA / "parts.toml")],
        ["library", "--library", str(lib), "add", str(run), "--all-parts"],
        ["library", "--library", str(lib), "add", str(DATA / "claims" / "BD-1004-typical.csv")],
    ]
    for argv in steps:
        assert main(argv) == 0, argv
    report = out / "verify"
    assert main(["verify", "--claim", str(DATA / "claims" / "BD-1004-typical.csv"), str(run), "--rule", "guarded",
                 "--out", str(report)]) in (0, 1, 3)
    assert main(["library", "--library", str(lib), "add", str(report / "report.json")]) == 0
    return lib


def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


class LiveServer:
    """uvicorn serving an app in a thread of this process, on a free loopback port."""

    def __init__(self, app):
        import uvicorn

        self.port = _free_port()
        self.url = f"http://127.0.0.1:{self.port}"
        self.server = uvicorn.Server(uvicorn.Config(app, host="127.0.0.1", port=self.port, log_level="warning"))
        self.thread = threading.Thread(target=self.server.run, daemon=True)

    def __enter__(self):
        self.thread.start()
        deadline = time.monotonic() + 20
        while not self.server.started:
            if time.monotonic() > deadline or not self.thread.is_alive():
                raise RuntimeError("the test server did not start")
            time.sleep(0.02)
        return self

    def __exit__(self, *exc):
        self.server.should_exit = True
        self.thread.join(10)


@pytest.fixture
def live_server():
    """LiveServer itself, for tests that serve an app of their own (test modules cannot import
    conftest under importlib mode)."""
    return LiveServer


def _need(reason: str):
    """Skip with the reason, or fail under CI (CI=true), where Chromium is installed."""
    import os

    if os.environ.get("CI") == "true":
        pytest.fail(f"CI=true but {reason}")
    pytest.skip(reason)


@pytest.fixture(scope="session")
def chromium(tmp_path_factory):
    """Headless Chromium through Selenium with the Debian driver; downloads go to a folder of its own."""
    browser_bin = shutil.which("chromium")
    if browser_bin is None or not Path(CHROMEDRIVER).exists():
        _need("no chromium / chromium-driver (apt-get install chromium chromium-driver)")
    from selenium import webdriver
    from selenium.webdriver.chrome.service import Service

    downloads = tmp_path_factory.mktemp("downloads")
    profile = tmp_path_factory.mktemp("chromium-profile")
    opts = webdriver.ChromeOptions()
    opts.binary_location = browser_bin
    for flag in ("--headless=new", "--no-sandbox", "--disable-gpu", "--disable-background-networking",
                 "--disable-component-update", "--disable-sync", "--no-first-run",
                 "--disable-dev-shm-usage", "--window-size=1280,1000", f"--user-data-dir={profile}"):
        opts.add_argument(flag)
    opts.add_experimental_option("prefs", {"download.default_directory": str(downloads),
                                           "download.prompt_for_download": False})
    try:
        driver = webdriver.Chrome(service=Service(CHROMEDRIVER), options=opts)
    except Exception as exc:  # noqa: BLE001 - a browser that cannot start is a reason to skip
        _need(f"headless chromium did not start ({str(exc).splitlines()[0]})")
    driver.downloads = downloads
    try:
        yield driver
    finally:
        driver.quit()


@pytest.fixture(scope="session")
def demo_site(demo_library):
    """The demo library served read-only on a loopback port, as `benchkit serve` serves it."""
    from benchkit.web import create_app

    with LiveServer(create_app(str(demo_library))) as server:
        yield server
