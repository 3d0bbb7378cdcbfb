"""`benchseq watch`: the live page follows a run on the simulated bench as its points are
stored (state JSON and page over HTTP, and in headless Chromium), reads without writing,
escapes strings from the file, answers GET only, and refuses a missing or damaged file
before serving.

The reference for what a page must show is what the project's reader returns
(``read_results`` / ``read_meta``) at the same moment; the shown uncertainty is U = 2u
(coverage factor k = 2, JCGM 100 (GUM) §6.2.1 and §6.3.3)."""

from __future__ import annotations

import contextlib
import hashlib
import html
import json
import math
import os
import queue
import signal
import subprocess
import sys
import threading
import time
import urllib.error
import urllib.request
from collections.abc import Callable, Iterator
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from browser_ref import Browser, require_browser
from report_files import HOSTILE_TITLE, row, write_result

import benchseq
from benchseq.cli import main
from benchseq.store import read_meta, read_results
from benchseq.watch import WatchServer, bind_warning, finish_estimate, open_server

ROOT = Path(__file__).resolve().parents[1]
DEADLINE_S = 60.0  # every wait below is bounded by this

SHORT = """\
title = "{title}"
[device]
absolute_max = "6 V"
min_operating = "3.8 V"
[sweep]
dc = ["5 V"]
ripple = ["100 mVpp"]
frequency = ["2 kHz", "5 kHz", "10 kHz", "20 kHz", "50 kHz"]
[mask]
points = [["1 kHz", "20 dB"], ["100 kHz", "15 dB"]]
"""
POINTS = 5


def _plan(folder: Path, title: str) -> Path:
    quoted = title.replace("\\", "\\\\").replace('"', '\\"')
    path = folder / "live.toml"
    path.write_text(SHORT.format(title=quoted), encoding="utf-8")
    return path


def _wait(what: str, probe: Callable[[], Any], deadline_s: float = DEADLINE_S) -> Any:
    """Poll ``probe`` until it returns something truthy; fail naming ``what`` at the deadline."""
    end = time.monotonic() + deadline_s
    while True:
        value = probe()
        if value:
            return value
        if time.monotonic() > end:
            pytest.fail(f"timed out after {deadline_s:g} s waiting for {what}")
        time.sleep(0.05)  # a poll interval, not a synchronisation


@contextlib.contextmanager
def serving(path: Path, lifetime_s: float = 240.0) -> Iterator[WatchServer]:
    """The watch server on 127.0.0.1, any free port, in a thread; shut down on exit and
    after ``lifetime_s`` at the latest."""
    server = open_server(path, "127.0.0.1", 0)
    thread = threading.Thread(target=server.serve_forever, kwargs={"poll_interval": 0.05})
    limit = threading.Timer(lifetime_s, server.shutdown)
    thread.start()
    limit.start()
    try:
        yield server
    finally:
        limit.cancel()
        server.shutdown()
        server.server_close()
        thread.join(timeout=10)
        assert not thread.is_alive()


def _get(url: str, headers: dict[str, str] | None = None) -> tuple[int, bytes, Any]:
    request = urllib.request.Request(url, headers=headers or {})
    try:
        with urllib.request.urlopen(request, timeout=20) as reply:
            return reply.status, reply.read(), reply.headers
    except urllib.error.HTTPError as exc:
        with exc:
            return exc.code, exc.read(), exc.headers


def _state(server: WatchServer) -> dict[str, Any]:
    code, body, headers = _get(server.url + "state.json")
    assert code == 200 and headers["Content-Type"].startswith("application/json")
    return json.loads(body)


class GatedRun:
    """A run of the short plan on the simulated bench in a thread that holds after each
    stored point until the test lets it go on (so each stored count can be seen)."""

    def __init__(self, plan: Path, out: Path) -> None:
        self.stored: queue.Queue[int] = queue.Queue()
        self.go_on = threading.Semaphore(0)
        self.released = threading.Event()  # set: stop holding (the test is over)
        self.result: Any = None
        self.error: BaseException | None = None
        self.thread = threading.Thread(target=self._run, args=(plan, out))

    def _event(self, event: Any) -> None:
        if event.kind == "point_stored":
            self.stored.put(int(event.done))
            if not self.released.is_set():
                self.go_on.acquire(timeout=DEADLINE_S)

    def _run(self, plan: Path, out: Path) -> None:
        try:
            self.result = benchseq.run(plan, out=out, on_event=self._event)
        except BaseException as exc:  # reported by the test
            self.error = exc

    def next_stored(self) -> int:
        try:
            return self.stored.get(timeout=DEADLINE_S)
        except queue.Empty:
            pytest.fail(f"no point stored within {DEADLINE_S:g} s (run error: {self.error!r})")

    def finish(self) -> None:
        self.released.set()
        for _ in range(POINTS + 1):
            self.go_on.release()
        self.thread.join(timeout=120)
        assert not self.thread.is_alive(), "the run did not end"
        assert self.error is None, self.error


@contextlib.contextmanager
def gated_run(folder: Path, title: str) -> Iterator[tuple[GatedRun, Path]]:
    out = folder / "live.h5"
    run = GatedRun(_plan(folder, title), out)
    run.thread.start()
    try:
        yield run, out
    finally:
        run.finish()


def test_state_follows_a_run_point_by_point(tmp_path: Path) -> None:
    with gated_run(tmp_path, "FV-33 live check") as (run, out):
        first = run.next_stored()  # the file exists from here on: serve it
        seen: list[int] = []
        with serving(out) as server:
            assert server.server_address[0] == "127.0.0.1"
            done = first
            while True:
                state = _wait(
                    f"{done} stored points on the page",
                    lambda d=done: (s := _state(server))["stored"] == d and s,
                )
                seen.append(state["stored"])
                assert state["status"] == "running" and state["status_text"] == "in progress"
                assert state["planned"] == POINTS
                # two points of this session give a pace; one does not
                assert (state["finish"] is not None) == (2 <= done < POINTS), state["finish_text"]
                assert state["latest"]["point_id"] == int(read_results(out)["point_id"].iloc[-1])
                page = _get(server.url)[1].decode("utf-8")
                assert f'<span id="stored">{done}</span>' in page
                if done == POINTS:
                    break
                run.go_on.release()
                done = run.next_stored()
            run.finish()
            final = _wait(
                "the run's ending", lambda: (s := _state(server))["status"] != "running" and s
            )
        frame = read_results(out)
        meta = read_meta(out)
    assert seen == list(range(1, POINTS + 1))  # the count grew one point at a time
    assert final["status"] == meta["status"] == "complete"
    assert final["stored"] == len(frame) == POINTS
    assert final["bounds"] == int(frame["is_bound"].sum())
    assert final["flagged"] == int((frame["flags"].str.strip() != "").sum())
    points = sorted(p for c in final["curves"] for p in c["points"])
    assert [p[4] for p in sorted(points, key=lambda p: p[4])] == sorted(frame["point_id"])
    by_id = frame.set_index("point_id")
    for f, value, u, bound, pid in points:
        assert f == pytest.approx(by_id.loc[pid, "frequency"], rel=1e-12)
        if bool(by_id.loc[pid, "is_bound"]):
            assert value is None and bound == pytest.approx(by_id.loc[pid, "bound_db"])
        else:
            assert value == pytest.approx(by_id.loc[pid, "rejection_db"], rel=1e-12)
            assert u == pytest.approx(by_id.loc[pid, "uncertainty_db"], rel=1e-12)
    assert final["mask"]["points"] == [[1e3, 20.0], [1e5, 15.0]]
    last = frame.iloc[-1]
    if not last["is_bound"]:  # shown as U = 2u (k = 2, JCGM 100 §6.2.1)
        assert f"± {2 * last['uncertainty_db']:.2f} dB" in final["latest"]["rejection"]
    assert final["finish_text"].startswith("finished")


def _fingerprint(folder: Path) -> dict[str, tuple[str, int]]:
    return {
        p.name: (hashlib.sha256(p.read_bytes()).hexdigest(), p.stat().st_mtime_ns)
        for p in sorted(folder.iterdir())
    }


HOSTILE_FLAG = "<img src=x onerror=window.pwned=3>"


def test_serving_writes_nothing_escapes_and_answers_get_only(tmp_path: Path) -> None:
    nan = math.nan
    path = write_result(
        tmp_path / "fv33.h5",
        [
            row(0, 100.0, 62.0),
            row(1, 1e3, nan, bound_db=55.0),
            row(2, 1e4, 41.0, flags=HOSTILE_FLAG),
        ],
        title=HOSTILE_TITLE,
        status="stopped",
        point_count=9,
    )
    before = _fingerprint(tmp_path)
    assert set(before) == {"fv33.h5", "fv33.h5.journal"}
    with serving(path) as server:
        code, page, headers = _get(server.url)
        assert code == 200 and "script-src 'self'" in headers["Content-Security-Policy"]
        text = page.decode("utf-8")
        assert HOSTILE_TITLE not in text and "<img" not in text
        # & < > " ' as character references, so the title is text and no tag or attribute
        # (HTML Living Standard, "Serialising HTML fragments", escaping a string; from
        # memory) — Python's html.escape with quote=True is the reference
        assert html.escape(HOSTILE_TITLE) in text
        state = _state(server)
        assert state["title"] == HOSTILE_TITLE  # JSON carries the text; the page sets it as text
        assert [f["flag"] for f in state["latest"]["flags"]] == HOSTILE_FLAG.split()
        assert {f["text"] for f in state["latest"]["flags"]} == {""}
        assert (state["status"], state["stored"], state["planned"], state["bounds"]) == (
            "stopped", 3, 9, 1)  # fmt: skip
        assert state["finish"] is None and state["finish_text"].startswith("unknown")
        for resource in ("watch.js", "watch.css"):
            assert _get(server.url + resource)[0] == 200
        assert _get(server.url + "no-such-page")[0] == 404
        # a Host that is not this machine's loopback name: refused (DNS rebinding; common practice)
        assert _get(server.url, {"Host": "attacker.example:80"})[0] == 403
        assert _get(server.url, {"Host": f"localhost:{server.server_address[1]}"})[0] == 200
        # a method the resource does not support: 405 with an Allow header (RFC 9110 §15.5.6)
        for method in ("POST", "PUT", "DELETE", "PATCH", "HEAD", "OPTIONS"):
            request = urllib.request.Request(server.url + "state.json", data=b"x", method=method)
            with pytest.raises(urllib.error.HTTPError) as refused:
                urllib.request.urlopen(request, timeout=20)
            with refused.value as answer:
                assert answer.code == 405 and answer.headers["Allow"] == "GET"
    assert _fingerprint(tmp_path) == before  # same files, bytes and modification times


def test_finish_estimate_at_this_sessions_pace() -> None:
    # hand-worked: 3 points of this session at t = 100, 110, 120 s -> 10 s each; 7 left
    meta = {"status": "running", "sessions": [{"started": "1970-01-01T00:01:35+00:00"}]}
    stored_at = np.array([10.0, 100.0, 110.0, 120.0])  # the first from an earlier session
    when, words = finish_estimate(meta, stored_at, 4, 11)
    assert when == "1970-01-01T00:03:10+00:00"  # 120 + 7 × 10 = 190 s
    assert "7 points left" in words
    assert finish_estimate(meta, np.array([100.0]), 1, 11) == (
        None, "unknown until two points of this session are stored")  # fmt: skip
    assert finish_estimate(meta, stored_at, 4, None)[0] is None
    assert finish_estimate({"status": "interrupted"}, stored_at, 4, 11)[0] is None


def test_bind_warning_only_off_loopback() -> None:
    for host in ("127.0.0.1", "::1", "localhost", "127.0.0.2"):
        assert bind_warning(host) is None
    for host in ("0.0.0.0", "192.0.2.7", "lab-pc"):
        warning = bind_warning(host)
        assert warning is not None and "no authentication" in warning and "SSH" in warning


def test_missing_or_damaged_file_refused_before_serving(
    tmp_path: Path, capsys: pytest.CaptureFixture
) -> None:
    assert main(["watch", str(tmp_path / "absent.h5")]) == 2
    assert "absent.h5" in capsys.readouterr().err
    damaged = tmp_path / "damaged.h5"
    damaged.write_bytes(b"\x89HDF\r\n\x1a\n" + bytes(range(256)) * 8)
    assert main(["watch", str(damaged)]) == 2
    err = capsys.readouterr().err
    assert "damaged.h5" in err and "Traceback" not in err
    assert main(["watch", str(tmp_path)]) == 2
    assert "folder" in capsys.readouterr().err
    assert sorted(p.name for p in tmp_path.iterdir()) == ["damaged.h5"]


def _ctrl_c_as_at_a_terminal() -> None:
    """In the child before it starts: SIGINT to its default. A process started in the
    background by a shell without job control inherits SIGINT ignored (POSIX, Shell
    Command Language §2.11), and Python then installs no KeyboardInterrupt for it; the
    test wants the command as a user at a terminal starts it."""
    signal.signal(signal.SIGINT, signal.SIG_DFL)


def test_command_prints_url_and_ends_cleanly_on_ctrl_c(tmp_path: Path) -> None:
    path = write_result(tmp_path / "done.h5", [row(k, 10.0**k, 70.0 - 10 * k) for k in range(1, 5)])
    before = _fingerprint(tmp_path)
    env = dict(os.environ, PYTHONUNBUFFERED="1", COLUMNS="200")
    with subprocess.Popen(
        [sys.executable, "-m", "benchseq", "watch", str(path), "--port", "0"],
        stdout=subprocess.PIPE,
        stderr=subprocess.PIPE,
        text=True,
        preexec_fn=_ctrl_c_as_at_a_terminal,
        env=env,
    ) as process:
        assert process.stdout is not None and process.stderr is not None
        lines: queue.Queue[str] = queue.Queue()
        out = process.stdout
        reader = threading.Thread(target=lambda: [lines.put(line) for line in out], daemon=True)
        reader.start()
        try:
            url = ""
            end = time.monotonic() + DEADLINE_S
            while not url:
                remaining = end - time.monotonic()
                if remaining <= 0 or process.poll() is not None:
                    pytest.fail(f"no URL printed (exit {process.poll()})")
                with contextlib.suppress(queue.Empty):
                    line = lines.get(timeout=remaining)
                    url = next((w for w in line.split() if w.startswith("http://127.0.0.1:")), "")
            state = json.loads(_get(url + "state.json")[1])
            assert state["status"] == "complete" and state["stored"] == 4
            process.send_signal(signal.SIGINT)
            process.wait(timeout=DEADLINE_S)
            err = process.stderr.read()
        finally:
            if process.poll() is None:
                process.kill()
                process.wait(timeout=10)
            reader.join(timeout=10)
    assert process.returncode == 0, err
    assert "Traceback" not in err
    assert _fingerprint(tmp_path) == before


# -- in the browser -------------------------------------------------------------------------
PAGE_FACTS = """
return {
  stored: document.getElementById('stored').textContent,
  planned: document.getElementById('planned').textContent,
  status: document.getElementById('status').textContent,
  h1: document.getElementById('title').textContent,
  pwned: typeof window.pwned === 'undefined' ? null : String(window.pwned),
  values: document.querySelectorAll('#rejection-plot circle.value').length,
  bounds: document.querySelectorAll('#rejection-plot path.bound').length,
  bars: document.querySelectorAll('#rejection-plot line.bar').length,
  mask: document.querySelectorAll('#mask-line').length,
  ring: document.querySelectorAll('#latest-ring').length,
  latest: document.getElementById('latest').textContent,
};
"""


def _drawn(facts: dict[str, Any], count: int) -> bool:
    """The script has shown ``count`` stored points: in the count and in the plot."""
    return facts["stored"] == str(count) and facts["values"] + facts["bounds"] == count


@pytest.mark.slow
def test_page_in_chromium_shows_points_as_they_are_stored(tmp_path: Path) -> None:
    chromium, driver = require_browser()
    with Browser(chromium, driver) as browser, gated_run(tmp_path, HOSTILE_TITLE) as (run, out):
        first = run.next_stored()
        with serving(out) as server:
            browser.open_url(server.url)
            shown: list[int] = []
            done = first
            while True:
                facts = _wait(
                    f"the page to show {done} stored points",
                    lambda d=done: _drawn(f := browser.run(PAGE_FACTS), d) and f,
                )
                shown.append(int(facts["stored"]))
                assert facts["pwned"] is None and facts["h1"] == HOSTILE_TITLE
                assert facts["values"] + facts["bounds"] == done and facts["ring"] == 1
                if done == POINTS:
                    break
                run.go_on.release()
                done = run.next_stored()
            run.finish()
            facts = _wait(
                "the page to say complete",
                lambda: (f := browser.run(PAGE_FACTS))["status"] == "complete" and f,
            )
        frame = read_results(out)
    assert shown == list(range(1, POINTS + 1))  # read at every stored point, increasing
    assert int(facts["stored"]) == len(frame) == POINTS and facts["planned"] == str(POINTS)
    assert facts["bounds"] == int(frame["is_bound"].sum())
    assert facts["bars"] == int((~frame["is_bound"] & frame["uncertainty_db"].notna()).sum())
    assert facts["mask"] == 1 and facts["pwned"] is None
    assert f"point {int(frame['point_id'].iloc[-1])} at" in facts["latest"]


def test_a_run_whose_writer_is_gone_reads_as_interrupted(tmp_path: Path) -> None:
    path = write_result(tmp_path / "cut.h5", [row(0, 1e3, 50.0), row(1, 1e4, 40.0)], status=None)
    with serving(path) as server:
        state = _state(server)
    assert (state["status"], state["status_text"]) == ("interrupted", "interrupted")
    assert state["finish"] is None and "interrupted" in state["finish_text"]
    assert "resume" in state["reason"]
