"""Headless Chromium as the reference HTML renderer for tests, driven over the W3C WebDriver
protocol with urllib (no Python dependency added).

``require_browser()`` finds chromium and chromedriver: without them a test is skipped, or it
fails when the CI environment variable is set. ``Browser`` starts chromedriver on 127.0.0.1
on a free port (bounded wait for it to be ready), opens one headless session, navigates and
runs scripts; ``close()`` deletes the session and stops chromedriver by its process id
(its whole process group: chromedriver and the browser it started)."""

from __future__ import annotations

import contextlib
import json
import os
import shutil
import signal
import socket
import subprocess
import tempfile
import time
import urllib.error
import urllib.request
from pathlib import Path
from typing import Any

START_TIMEOUT_S = 20.0
REQUEST_TIMEOUT_S = 60.0
_CHROMIUM_NAMES = ("chromium", "chromium-browser", "google-chrome", "chrome")


def chromium_path() -> str | None:
    return next((p for p in map(shutil.which, _CHROMIUM_NAMES) if p), None)


def chromedriver_path() -> str | None:
    return shutil.which("chromedriver")


def require_browser() -> tuple[str, str]:
    """(chromium, chromedriver); pytest.skip without them, or pytest.fail when CI is set."""
    import pytest

    chromium, driver = chromium_path(), chromedriver_path()
    if chromium is None or driver is None:
        missing = " and ".join(
            name for name, found in (("chromium", chromium), ("chromedriver", driver)) if not found
        )
        reason = f"{missing} not on PATH (Debian: apt-get install -y chromium chromium-driver)"
        if os.environ.get("CI"):
            pytest.fail(f"{reason}; CI is set, so the browser check is required")
        pytest.skip(reason)
    return chromium, driver  # type: ignore[return-value]


def _free_port() -> int:
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as probe:
        probe.bind(("127.0.0.1", 0))
        return int(probe.getsockname()[1])


class WebDriverError(RuntimeError):
    """chromedriver answered with an error (its message is kept)."""


class Browser:
    """One headless Chromium session through a chromedriver this object started."""

    def __init__(self, chromium: str, driver: str) -> None:
        self.port = _free_port()
        self.base = f"http://127.0.0.1:{self.port}"
        self.profile = tempfile.TemporaryDirectory(
            prefix="benchseq-chromium-", ignore_cleanup_errors=True
        )
        self.log = open(Path(self.profile.name) / "chromedriver.log", "w+b")  # noqa: SIM115
        self.process = subprocess.Popen(
            [driver, f"--port={self.port}", "--allowed-ips=127.0.0.1"],
            stdout=self.log,
            stderr=subprocess.STDOUT,
            start_new_session=True,
        )
        self.session: str | None = None
        try:
            self._wait_ready()
            capabilities = {
                "browserName": "chrome",
                "goog:chromeOptions": {
                    "binary": chromium,
                    "args": [
                        "--headless=new",
                        "--no-sandbox",
                        "--disable-gpu",
                        "--disable-dev-shm-usage",
                        "--no-first-run",
                        f"--user-data-dir={Path(self.profile.name) / 'profile'}",
                        "--window-size=1280,1600",
                    ],
                },
            }
            reply = self._call("POST", "/session", {"capabilities": {"alwaysMatch": capabilities}})
            self.session = reply["sessionId"]
            self._call(
                "POST", f"/session/{self.session}/timeouts", {"script": 20000, "pageLoad": 30000}
            )
        except BaseException:
            self.close()
            raise

    def _wait_ready(self) -> None:
        deadline = time.monotonic() + START_TIMEOUT_S
        while time.monotonic() < deadline:
            if self.process.poll() is not None:
                raise WebDriverError(f"chromedriver exited early: {self.driver_log()}")
            with contextlib.suppress(OSError, ValueError, WebDriverError):
                if self._call("GET", "/status", timeout=2.0).get("ready"):
                    return
            time.sleep(0.1)
        raise WebDriverError(
            f"chromedriver not ready within {START_TIMEOUT_S} s: {self.driver_log()}"
        )

    def driver_log(self) -> str:
        self.log.flush()
        self.log.seek(0)
        return self.log.read().decode("utf-8", "replace")[-2000:]

    def _call(
        self,
        method: str,
        path: str,
        body: dict[str, Any] | None = None,
        timeout: float = REQUEST_TIMEOUT_S,
    ) -> Any:
        data = None if body is None else json.dumps(body).encode("utf-8")
        request = urllib.request.Request(
            self.base + path,
            data=data,
            method=method,
            headers={"Content-Type": "application/json; charset=utf-8"},
        )
        try:
            with urllib.request.urlopen(request, timeout=timeout) as response:
                payload = json.loads(response.read().decode("utf-8") or "{}")
        except urllib.error.HTTPError as exc:
            text = exc.read().decode("utf-8", "replace")
            raise WebDriverError(f"{method} {path}: HTTP {exc.code}: {text[:1500]}") from None
        return payload.get("value", payload)

    def open(self, path: Path) -> None:
        """Navigate to a local file (file:// URL)."""
        self._call("POST", f"/session/{self.session}/url", {"url": path.resolve().as_uri()})

    def open_url(self, url: str) -> None:
        """Navigate to a URL (a test's own server on 127.0.0.1)."""
        self._call("POST", f"/session/{self.session}/url", {"url": url})

    def run(self, script: str, *args: Any) -> Any:
        """Run a synchronous script in the page (``return`` gives its value)."""
        return self._call(
            "POST", f"/session/{self.session}/execute/sync", {"script": script, "args": list(args)}
        )

    def close(self) -> None:
        if self.session is not None:
            with contextlib.suppress(OSError, WebDriverError, ValueError):
                self._call("DELETE", f"/session/{self.session}", timeout=15.0)
            self.session = None
        # the group is chromedriver's own (start_new_session): it and the browser it started
        with contextlib.suppress(ProcessLookupError, PermissionError):
            os.killpg(self.process.pid, signal.SIGTERM)
        if self.process.poll() is None:
            try:
                self.process.wait(timeout=10)
            except subprocess.TimeoutExpired:
                with contextlib.suppress(ProcessLookupError, PermissionError):
                    os.killpg(self.process.pid, signal.SIGKILL)
                self.process.wait(timeout=10)
        self.log.close()
        self.profile.cleanup()

    def __enter__(self) -> Browser:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()
