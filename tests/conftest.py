"""Shared test set-up: Debian chromium for Playwright, and a served dashboard.

Browser tests (marked ``ui``) use /usr/bin/chromium. Where it is missing they are skipped
with the reason — except under CI (``CI=true``), where a missing browser is an error.
"""
import os
import shutil
import socket
import time
import urllib.request
from pathlib import Path

import pytest

from browser_js import CHROMIUM, CHROMIUM_ARGS

ROOT = Path(__file__).resolve().parents[1]
SAMPLES = ROOT / "sample_scenes"
ARTIFACTS = ROOT / "test-artifacts"
IN_CI = os.environ.get("CI", "").lower() == "true"
NO_BROWSER = (f"{CHROMIUM} not found: install Debian's chromium (apt-get install chromium) to run the "
              "browser tests")


def pytest_sessionstart(session):
    # compile the float32 physics kernels once (numba caches them) before any test starts a
    # CLI or dashboard subprocess, so that those only load the cached machine code
    from physics import fused

    fused.warm_up()
    from physics import cloud_kernel

    cloud_kernel.warm_up()


def pytest_collection_modifyitems(config, items):
    # Browser tests run last: Playwright's sync API keeps an event loop running in the main
    # thread for the rest of the session, which breaks later tests that call asyncio.run().
    items.sort(key=lambda item: "ui" in item.keywords)  # stable: order kept within each group
    if CHROMIUM.exists() or IN_CI:
        return
    skip = pytest.mark.skip(reason=NO_BROWSER)
    for item in items:
        if "ui" in item.keywords:
            item.add_marker(skip)


@pytest.fixture(scope="session")
def browser_type_launch_args(browser_type_launch_args):
    """pytest-playwright's launch arguments, pointed at Debian's chromium."""
    if not CHROMIUM.exists():
        pytest.fail(f"CI=true and {NO_BROWSER}") if IN_CI else pytest.skip(NO_BROWSER)
    return {**browser_type_launch_args, "executable_path": str(CHROMIUM), "args": CHROMIUM_ARGS}


@pytest.fixture(scope="session")
def artifacts():
    """Folder for screenshots and downloads kept after the run (git-ignored)."""
    ARTIFACTS.mkdir(exist_ok=True)
    return ARTIFACTS


def free_port():
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


class ServedApp:
    """The dashboard served by this process on a free port, over a data folder.

    ``restart()`` stops the server and starts a new one on the same folder (a new port),
    as a user restarting ``cloudsieve serve`` would.
    """

    def __init__(self, data_dir, **app_kwargs):
        self.data_dir = Path(data_dir)
        self.app_kwargs = app_kwargs
        self.thread = None
        self.port = None

    @property
    def url(self):
        return f"http://127.0.0.1:{self.port}/"

    def start(self, timeout=60.0):
        import panel as pn

        from dashboard.app import create_app

        data_dir, kwargs = self.data_dir, self.app_kwargs

        def app():  # a plain function: one page (and model) per browser session
            return create_app(data_dir=data_dir, **kwargs)

        self.port = free_port()
        self.thread = pn.serve(app, port=self.port, address="127.0.0.1", threaded=True, show=False,
                               websocket_origin=[f"127.0.0.1:{self.port}"], liveness=True, verbose=False)
        deadline = time.monotonic() + timeout
        while True:
            try:
                with urllib.request.urlopen(f"{self.url}liveness", timeout=5) as r:
                    if r.status == 200:
                        return self
            except OSError:
                pass
            if time.monotonic() > deadline:
                raise RuntimeError(f"dashboard did not start on port {self.port} within {timeout} s")
            time.sleep(0.1)

    def stop(self):
        if self.thread is not None:
            self.thread.stop()
            self.thread.join(timeout=30)
            self.thread = None

    def restart(self):
        self.stop()
        return self.start()


@pytest.fixture
def scene_dir(tmp_path):
    """A data folder holding a copy of the sample scene night_front.nc (edits are journaled here)."""
    folder = tmp_path / "scenes"
    folder.mkdir()
    shutil.copy(SAMPLES / "night_front.nc", folder / "night_front.nc")
    return folder


@pytest.fixture
def serve_app():
    """Factory: ``serve_app(data_dir, **create_app_kwargs)`` starts a dashboard, stopped after the test."""
    started = []

    def start(data_dir, **kwargs):
        started.append(ServedApp(data_dir, **kwargs).start())
        return started[-1]

    yield start
    for served in started:
        served.stop()


@pytest.fixture
def served_app(serve_app, scene_dir):
    """The dashboard served on a free port over ``scene_dir`` (a copy of the sample scene)."""
    return serve_app(scene_dir)
