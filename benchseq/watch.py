"""`benchseq watch RESULT.h5`: a read-only local web page that follows a run from its
durable record (the HDF5 file merged with its journal, as every reader sees it).

The server is the standard library's ``ThreadingHTTPServer``. It serves three fixed
resources and one JSON state: ``/`` (the page; strings from the file escaped with
``html.escape``), ``/watch.js`` and ``/watch.css`` (no inline script or style, so a
Content-Security-Policy of ``'self'`` holds), ``/state.json`` (what the page polls). Only
GET is answered (405 for the other methods); on a loopback address the Host header must
name a loopback host (a page elsewhere cannot reach it through DNS rebinding).

Nothing is written: results are read with ``read_meta`` / ``read_results`` (HDF5 opened
read-only, the journal read, the writer's lock only probed as every reader does) and never
repaired. A state is read at most once per ``REFRESH_S`` unless the files changed, under
one lock, so many open pages cost no more than one.
"""

from __future__ import annotations

import datetime as dt
import html
import ipaddress
import json
import math
import os
import threading
import time
import warnings
from dataclasses import dataclass
from http.server import BaseHTTPRequestHandler, ThreadingHTTPServer
from pathlib import Path
from typing import Any

import numpy as np

from benchseq.errors import BadInput, BenchseqError
from benchseq.records import FLAG_TEXT, SHOWN_COVERAGE_FACTOR

REFRESH_S = 1.0  # a running file is read again at most this often when nothing changed
MIN_GAP_S = 0.25  # ... and at most this often when it did
POLL_MS = 1000  # how often the page asks for /state.json

STATUS_WORDS = {
    "running": "in progress",
    "complete": "complete",
    "stopped": "stopped",
    "aborted": "aborted",
    "interrupted": "interrupted",
}
_LOOPBACK_NAMES = {"localhost", "127.0.0.1", "::1", "[::1]"}


def bind_warning(host: str) -> str | None:
    """The warning to print when the page is served on a non-loopback address (None for
    loopback: only this machine can reach it)."""
    try:
        loopback = ipaddress.ip_address(host.strip("[]")).is_loopback
    except ValueError:
        loopback = host == "localhost"
    if loopback:
        return None
    return (
        f"serving on {host}: the page has no authentication, so anyone who can reach this "
        "address can read the run. To follow a run from another machine, prefer an SSH "
        "tunnel to the default 127.0.0.1 instead (ssh -L 8800:127.0.0.1:PORT this-host)."
    )


# -- the state a page shows --------------------------------------------------------------
def _num(value: Any) -> float | None:
    """A finite float, or None (JSON has no NaN)."""
    try:
        number = float(value)
    except (TypeError, ValueError):
        return None
    return number if math.isfinite(number) else None


def _iso(unix_time: float | None) -> str | None:
    if unix_time is None:
        return None
    return dt.datetime.fromtimestamp(unix_time, dt.UTC).isoformat(timespec="seconds")


def _unix(text: Any) -> float | None:
    try:
        return dt.datetime.fromisoformat(str(text)).timestamp()
    except (TypeError, ValueError):
        return None


def _rejection_text(row: dict[str, Any]) -> str:
    if bool(row.get("is_bound")):
        bound = _num(row.get("bound_db"))
        return f"≥ {bound:.2f} dB (lower bound)" if bound is not None else "not known"
    value, u = _num(row.get("rejection_db")), _num(row.get("uncertainty_db"))
    if value is None:
        return "not known"
    if u is None:
        return f"{value:.2f} dB"
    k = SHOWN_COVERAGE_FACTOR
    return f"{value:.2f} ± {k * u:.2f} dB (U, k = {k:g})"


def finish_estimate(
    meta: dict[str, Any], stored_at: np.ndarray, stored: int, planned: int | None
) -> tuple[str | None, str]:
    """(ISO time or None, words): when a running run should end, extrapolated at the wall-
    clock pace of this session's points (time between consecutive stored points, so settling
    and operating-point changes are in it). Unknown without a plan count or two points of
    this session."""
    status = str(meta.get("status", ""))
    if status == "complete":
        ended = meta.get("ended")
        return (str(ended), f"finished {ended}") if ended else (None, "finished")
    if status != "running":
        return None, f"unknown: the run is {STATUS_WORDS.get(status, status)}, not measuring"
    if planned is None:
        return None, "unknown: the file does not say how many points are planned"
    left = planned - stored
    if left <= 0:
        return None, "every planned point is stored; the run is finishing"
    sessions = [s for s in meta.get("sessions") or [] if isinstance(s, dict)]
    since = _unix(sessions[-1].get("started")) if sessions else _unix(meta.get("started"))
    times = np.sort(stored_at[np.isfinite(stored_at)])
    if since is not None:
        times = times[times >= since - 1.0]
    if times.size < 2:
        return None, "unknown until two points of this session are stored"
    pace = float(times[-1] - times[0]) / (times.size - 1)
    finish = float(times[-1]) + left * pace
    return _iso(finish), (
        f"about {_iso(finish)} ({left} points left at {pace:.3g} s each, the pace of the "
        f"last {times.size} points; a slower decade ahead takes longer)"
    )


def read_state(path: Path) -> dict[str, Any]:
    """Everything the page shows, as JSON-able values (BenchseqError when unreadable)."""
    from benchseq.report.model import _curves, _stored_plan
    from benchseq.results import ResultWarning
    from benchseq.store import read_meta, read_results
    from benchseq.verdict import mask_verdict

    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always", ResultWarning)
        try:
            meta = read_meta(path)
            frame = read_results(path)
        except BenchseqError:
            raise
        except (OSError, ValueError, KeyError, TypeError) as exc:
            raise BadInput(f"{path}: cannot read this result file ({exc})") from None
    notices = list(dict.fromkeys(str(w.message) for w in caught if w.category is ResultWarning))
    frame.attrs = {}  # units and descriptions are not shown; pandas would copy them per step
    if "point_id" in frame.columns:  # a read that met an update's rename may repeat a point
        frame = frame.drop_duplicates("point_id", keep="first")
    count = meta.get("point_count")
    planned = int(count) if isinstance(count, int | float) and math.isfinite(count) else None
    plan, problem = _stored_plan(meta, path)
    mask = plan.mask if plan is not None else None
    verdict = mask_verdict(mask, frame, SHOWN_COVERAGE_FACTOR, planned)
    sorted_frame = (
        frame.sort_values("point_id", kind="stable").reset_index(drop=True)
        if "point_id" in frame.columns
        else frame
    )
    curves: list[dict[str, Any]] = []
    for curve in _curves(0, sorted_frame, 0):
        rows = curve.frame
        curves.append(
            {
                "label": curve.label(),
                "repeats": curve.repeats,
                "points": [
                    [
                        _num(r.get("frequency")),
                        None if r.get("is_bound") else _num(r.get("rejection_db")),
                        None if r.get("is_bound") else _num(r.get("uncertainty_db")),
                        _num(r.get("bound_db")) if r.get("is_bound") else None,
                        int(r.get("point_id", -1)),
                    ]
                    for r in rows.to_dict(orient="records")
                ],
            }
        )
    status = str(meta.get("status", "unknown"))
    stored = len(frame)
    flags = frame["flags"].astype(str) if "flags" in frame.columns else None
    stored_at = (
        frame["stored_at"].to_numpy(dtype=float)
        if "stored_at" in frame.columns
        else np.array([], dtype=float)
    )
    latest = None
    if stored:
        # the latest point: last stored (storage order; the stored time where there is one)
        at = int(np.nanargmax(stored_at)) if np.isfinite(stored_at).any() else stored - 1
        row = frame.iloc[at].to_dict()
        label = next(
            (c["label"] for c in curves if any(p[4] == int(row["point_id"]) for p in c["points"])),
            "",
        )
        names = str(row.get("flags", "") or "").split()
        latest = {
            "point_id": int(row.get("point_id", -1)),
            "frequency": _num(row.get("frequency")),
            "frequency_planned": _num(row.get("frequency_planned")),
            "operating_point": label,
            "rejection": _rejection_text(row),
            "is_bound": bool(row.get("is_bound")),
            "flags": [{"flag": f, "text": FLAG_TEXT.get(f, "")} for f in names],
            "stored_at": _iso(_num(row.get("stored_at"))),
        }
    finish, finish_text = finish_estimate(meta, stored_at, stored, planned)
    reason = meta.get("reason")
    return {
        "file": str(path),
        "title": str(meta.get("title", "") or ""),
        "device": str(meta.get("device", "") or ""),
        "run_id": str(meta.get("run_id", "") or ""),
        "bench": str(meta.get("bench_name", "") or ""),
        "status": status,
        "status_text": STATUS_WORDS.get(status, status),
        "reason": str(reason) if reason else "",
        "started": str(meta.get("started", "") or ""),
        "ended": str(meta.get("ended", "") or ""),
        "stored": stored,
        "planned": planned,
        "bounds": int(frame["is_bound"].astype(bool).sum()) if "is_bound" in frame else 0,
        "flagged": int((flags.str.strip() != "").sum()) if flags is not None else 0,
        "finish": finish,
        "finish_text": finish_text,
        "latest": latest,
        "curves": curves,
        "mask": (
            {
                "name": str(mask.name or ""),
                "points": [
                    [float(f), float(d)]
                    for f, d in zip(mask.frequencies, mask.min_rejection_db, strict=True)
                ],
            }
            if mask is not None
            else None
        ),
        "verdict": (
            f"no mask verdict: the stored plan could not be read ({problem})"
            if mask is None and problem
            else verdict.summary()
        ),
        "coverage": f"bars: U = {SHOWN_COVERAGE_FACTOR:g}u (k = {SHOWN_COVERAGE_FACTOR:g})",
        "notices": notices,
        "read_at": _iso(time.time()),
        "read_problem": None,
    }


def _signature(path: Path) -> tuple[Any, ...]:
    """What changes when a writer stores something (file identities, sizes, times)."""
    parts: list[Any] = []
    for name in (path, Path(str(path) + ".journal"), Path(str(path) + ".lock")):
        try:
            st = os.stat(name)
            parts.append((st.st_ino, st.st_size, st.st_mtime_ns))
        except OSError:
            parts.append(None)
    return tuple(parts)


class Watcher:
    """The latest state of one result file, read again only when it may have changed."""

    def __init__(self, path: str | Path) -> None:
        self.path = Path(path)
        self._lock = threading.Lock()
        self._state: dict[str, Any] | None = None
        self._json: bytes = b""
        self._signature: tuple[Any, ...] | None = None
        self._read_at = -math.inf
        self._read_s = 0.0  # how long the last read took
        self._probed_at = -math.inf  # when the writer's lock was last probed

    def first(self) -> dict[str, Any]:
        """Read once (raises BadInput for a missing or damaged file: before serving)."""
        from benchseq.writelock import refuse_non_regular

        if self.path.is_dir():
            raise BadInput(f"{self.path} is a folder; give a result file (.h5)")
        refuse_non_regular(self.path)
        with self._lock:
            started = time.monotonic()
            self._store(read_state(self.path), _signature(self.path), started)
        assert self._state is not None
        return self._state

    def state_json(self) -> bytes:
        """The state as JSON: read again when the files changed (at most every
        max(MIN_GAP_S, 2 × the last read's duration), so reading takes at most a third of
        a core whatever the size), or, for a running file, when its writer is gone."""
        from benchseq.writelock import writer_alive

        with self._lock:
            now = time.monotonic()
            since = now - self._read_at
            signature = _signature(self.path)
            changed = signature != self._signature
            running = self._state is None or self._state.get("status") == "running"
            due = changed and since >= max(MIN_GAP_S, 2.0 * self._read_s)
            if not due and running and now - max(self._read_at, self._probed_at) >= REFRESH_S:
                self._probed_at = now  # nothing written: only the writer's end can change it
                due = writer_alive(self.path) is False
            if due:
                try:
                    self._store(read_state(self.path), signature, now)
                except (BenchseqError, OSError, ValueError, KeyError, TypeError) as exc:
                    # keep showing the last good state; say why it is not newer
                    self._read_at = time.monotonic()
                    if self._state is not None:
                        state = dict(self._state, read_problem=str(exc))
                        self._json = _dumps(state)
            return self._json

    def _store(self, state: dict[str, Any], signature: tuple[Any, ...], started: float) -> None:
        self._state = state
        self._signature = signature
        self._read_at = time.monotonic()
        self._read_s = self._read_at - started
        self._json = _dumps(state)


def _dumps(state: dict[str, Any]) -> bytes:
    return json.dumps(state, allow_nan=False, ensure_ascii=False).encode("utf-8")


# -- the page -------------------------------------------------------------------------------
CSP = (
    "default-src 'none'; script-src 'self'; style-src 'self'; connect-src 'self'; "
    "img-src 'self'; base-uri 'none'; form-action 'none'; frame-ancestors 'none'"
)


def page_html(state: dict[str, Any]) -> str:
    """The page: static parts filled from the first state, every file string escaped; the
    script fills the rest from /state.json (as text, never as markup)."""
    e = html.escape
    title = state["title"] or Path(state["file"]).name
    return f"""<!DOCTYPE html>
<html lang="en"><head><meta charset="utf-8">
<meta name="viewport" content="width=device-width, initial-scale=1">
<title>{e(title)} — benchseq watch</title>
<link rel="stylesheet" href="/watch.css">
<script src="/watch.js" defer></script>
</head><body data-poll-ms="{POLL_MS}">
<header>
<h1 id="title">{e(title)}</h1>
<p class="sub"><span id="device">{e(state["device"])}</span> · <span id="file">{e(state["file"])}</span>
 · run <span id="run-id">{e(state["run_id"][:8])}</span></p>
</header>
<section id="summary">
<dl>
<dt>status</dt><dd><span id="status" class="status-{e(state["status"])}">{e(state["status_text"])}</span>
 <span id="reason">{e(state["reason"])}</span></dd>
<dt>points stored</dt><dd><span id="stored">{state["stored"]}</span> of
 <span id="planned">{e(str(state["planned"] if state["planned"] is not None else "?"))}</span> planned</dd>
<dt>lower bounds</dt><dd id="bounds">{state["bounds"]}</dd>
<dt>flagged</dt><dd id="flagged">{state["flagged"]}</dd>
<dt>finish</dt><dd id="finish">{e(state["finish_text"])}</dd>
<dt>mask</dt><dd id="verdict">{e(state["verdict"])}</dd>
</dl>
<p id="problem" class="problem"></p>
<ul id="notices" class="notices"></ul>
</section>
<section id="plot-section">
<h2>Rejection so far</h2>
<div id="plot" role="img" aria-label="rejection in dB over log frequency"></div>
<p class="note"><span id="coverage">{e(state["coverage"])}</span>; △ lower bound (output under
the noise floor); dashed: the plan's mask; ringed: the latest point.</p>
</section>
<section id="latest-section">
<h2>Latest point</h2>
<p id="latest">none stored yet</p>
<ul id="latest-flags"></ul>
</section>
<footer><p>benchseq watch: read-only; updated <span id="read-at">{e(state["read_at"] or "")}</span>
<span id="connection"></span></p></footer>
</body></html>
"""


STYLE = """
body { font: 15px/1.4 system-ui, sans-serif; margin: 1.5em auto; max-width: 1100px;
       padding: 0 1em; color: #222; }
h1 { font-size: 1.5em; margin: 0 0 .2em; overflow-wrap: anywhere; }
h2 { font-size: 1.1em; margin: 1.2em 0 .4em; }
.sub { color: #555; margin: 0; overflow-wrap: anywhere; }
dl { display: grid; grid-template-columns: max-content 1fr; gap: .2em 1em; margin: 1em 0; }
dt { font-weight: 600; }
dd { margin: 0; overflow-wrap: anywhere; }
.status-running { color: #06c; font-weight: 600; }
.status-complete { color: #080; font-weight: 600; }
.status-stopped, .status-interrupted { color: #b60; font-weight: 600; }
.status-aborted { color: #c00; font-weight: 600; }
.problem { color: #c00; }
.notices { color: #b60; }
#plot svg { width: 100%; height: auto; border: 1px solid #ddd; background: #fff; }
#plot text { font: 12px system-ui, sans-serif; fill: #333; }
.note, footer { color: #555; font-size: .9em; }
.flag { font-family: ui-monospace, monospace; }
"""

SCRIPT = r"""
"use strict";
(function () {
  const SVG = "http://www.w3.org/2000/svg";
  const COLOURS = ["#1f77b4", "#d62728", "#2ca02c", "#9467bd", "#ff7f0e", "#17becf",
                   "#8c564b", "#e377c2", "#7f7f7f", "#bcbd22"];
  const W = 900, H = 460, L = 64, R = 230, T = 16, B = 48;
  const byId = (id) => document.getElementById(id);
  const text = (id, value) => { const el = byId(id); if (el) el.textContent = value; };

  function el(name, attrs, parent) {
    const node = document.createElementNS(SVG, name);
    for (const k in attrs) node.setAttribute(k, String(attrs[k]));
    if (parent) parent.appendChild(node);
    return node;
  }
  function hz(f) {
    const units = [[1e9, "GHz"], [1e6, "MHz"], [1e3, "kHz"], [1, "Hz"], [1e-3, "mHz"]];
    for (const [s, u] of units) if (Math.abs(f) >= s) return +(f / s).toPrecision(4) + " " + u;
    return f + " Hz";
  }

  function draw(state) {
    const box = byId("plot");
    const svg = el("svg", { viewBox: `0 0 ${W} ${H}`, id: "rejection-plot" });
    const xs = [], ys = [];
    for (const c of state.curves) for (const p of c.points) {
      if (p[0] === null) continue;
      if (p[1] !== null) { xs.push(p[0]); ys.push(p[1] - 2 * (p[2] || 0), p[1] + 2 * (p[2] || 0)); }
      if (p[3] !== null) { xs.push(p[0]); ys.push(p[3], p[3] + 6); }
    }
    if (state.mask) for (const m of state.mask.points) { xs.push(m[0]); ys.push(m[1]); }
    if (!xs.length) {
      el("text", { x: W / 2, y: H / 2, "text-anchor": "middle" }, svg).textContent =
        "no point stored yet";
      box.replaceChildren(svg);
      return;
    }
    let x0 = Math.floor(Math.log10(Math.min(...xs))), x1 = Math.ceil(Math.log10(Math.max(...xs)));
    if (x1 <= x0) x1 = x0 + 1;
    let y0 = Math.floor(Math.min(...ys) / 10) * 10, y1 = Math.ceil(Math.max(...ys) / 10) * 10;
    if (y1 <= y0) y1 = y0 + 10;
    const px = (f) => L + (Math.log10(f) - x0) / (x1 - x0) * (W - L - R);
    const py = (d) => T + (y1 - d) / (y1 - y0) * (H - T - B);
    const grid = el("g", { stroke: "#e4e4e4", "stroke-width": 1 }, svg);
    const labels = el("g", {}, svg);
    for (let k = x0; k <= x1; k++) {
      el("line", { x1: px(10 ** k), x2: px(10 ** k), y1: T, y2: H - B }, grid);
      el("text", { x: px(10 ** k), y: H - B + 16, "text-anchor": "middle" }, labels).textContent =
        hz(10 ** k);
    }
    const step = (y1 - y0) > 80 ? 20 : 10;
    for (let d = y0; d <= y1; d += step) {
      el("line", { x1: L, x2: W - R, y1: py(d), y2: py(d) }, grid);
      el("text", { x: L - 6, y: py(d) + 4, "text-anchor": "end" }, labels).textContent = d;
    }
    el("text", { x: (L + W - R) / 2, y: H - 8, "text-anchor": "middle" }, labels).textContent =
      "frequency (log)";
    el("text", { x: 14, y: (T + H - B) / 2, "text-anchor": "middle",
                 transform: `rotate(-90 14 ${(T + H - B) / 2})` }, labels).textContent =
      "rejection (dB)";
    el("rect", { x: L, y: T, width: W - L - R, height: H - T - B, fill: "none", stroke: "#999" },
       svg);
    if (state.mask) {
      const pts = state.mask.points.map((m) => `${px(m[0])},${py(m[1])}`).join(" ");
      el("polyline", { points: pts, fill: "none", stroke: "#000", "stroke-width": 1.5,
                       "stroke-dasharray": "6 4", id: "mask-line" }, svg);
    }
    const latest = state.latest ? state.latest.point_id : null;
    state.curves.forEach((c, i) => {
      const colour = COLOURS[i % COLOURS.length];
      const g = el("g", { class: "curve", "data-label": c.label }, svg);
      const values = c.points.filter((p) => p[0] !== null && p[1] !== null);
      if (!c.repeats && values.length > 1)
        el("polyline", { points: values.map((p) => `${px(p[0])},${py(p[1])}`).join(" "),
                         fill: "none", stroke: colour, "stroke-width": 1.5 }, g);
      for (const p of c.points) {
        if (p[0] === null) continue;
        const x = px(p[0]);
        if (p[1] !== null) {
          if (p[2] !== null) {
            const u = 2 * p[2];
            el("line", { x1: x, x2: x, y1: py(p[1] - u), y2: py(p[1] + u), stroke: colour,
                         class: "bar" }, g);
            for (const end of [p[1] - u, p[1] + u])
              el("line", { x1: x - 3, x2: x + 3, y1: py(end), y2: py(end), stroke: colour,
                           class: "cap" }, g);
          }
          el("circle", { cx: x, cy: py(p[1]), r: 3.5, fill: colour, class: "value",
                         "data-point": p[4] }, g);
        } else if (p[3] !== null) {
          const y = py(p[3]);  // a rising triangle at the bound: the value lies above
          el("path", { d: `M${x - 5},${y + 4} L${x + 5},${y + 4} L${x},${y - 6} Z`,
                       fill: "none", stroke: colour, "stroke-width": 1.5, class: "bound",
                       "data-point": p[4] }, g);
        }
        if (p[4] === latest) {
          const y = p[1] !== null ? py(p[1]) : (p[3] !== null ? py(p[3]) : null);
          if (y !== null) el("circle", { cx: x, cy: y, r: 8, fill: "none", stroke: "#000",
                                          "stroke-width": 1.5, id: "latest-ring" }, svg);
        }
      }
      const ly = T + 14 + i * 18;
      el("line", { x1: W - R + 12, x2: W - R + 32, y1: ly - 4, y2: ly - 4, stroke: colour,
                   "stroke-width": 2 }, labels);
      el("text", { x: W - R + 38, y: ly }, labels).textContent =
        (c.repeats ? "repeat: " : "") + c.label;
    });
    box.replaceChildren(svg);
  }

  function show(state) {
    text("title", state.title || state.file);
    document.title = (state.title || state.file) + " — benchseq watch";
    text("device", state.device);
    text("status", state.status_text);
    byId("status").className = "status-" + state.status;
    text("reason", state.reason ? "— " + state.reason : "");
    text("stored", state.stored);
    text("planned", state.planned === null ? "?" : state.planned);
    text("bounds", state.bounds);
    text("flagged", state.flagged);
    text("finish", state.finish_text);
    text("verdict", state.verdict);
    text("coverage", state.coverage);
    text("problem", state.read_problem ? "latest read failed: " + state.read_problem : "");
    const notices = byId("notices");
    notices.replaceChildren(...state.notices.map((n) => {
      const li = document.createElement("li"); li.textContent = n; return li;
    }));
    const p = state.latest;
    text("latest", p ? `point ${p.point_id} at ${hz(p.frequency)}` +
      (p.operating_point ? ` (${p.operating_point})` : "") + `: ${p.rejection}` +
      (p.stored_at ? `; stored ${p.stored_at}` : "") : "none stored yet");
    byId("latest-flags").replaceChildren(...(p ? p.flags : []).map((f) => {
      const li = document.createElement("li");
      const name = document.createElement("span");
      name.className = "flag"; name.textContent = f.flag;
      li.append(name, f.text ? ": " + f.text : "");
      return li;
    }));
    text("read-at", state.read_at || "");
    draw(state);
  }

  let last = "";
  async function poll() {
    try {
      const reply = await fetch("/state.json", { cache: "no-store" });
      if (!reply.ok) throw new Error("HTTP " + reply.status);
      const body = await reply.text();
      if (body !== last) { last = body; show(JSON.parse(body)); }
      text("connection", "");
    } catch (err) {
      text("connection", "— the watch server does not answer (" + err.message + ")");
    }
    setTimeout(poll, Number(document.body.dataset.pollMs) || 1000);
  }
  poll();
})();
"""


@dataclass
class _Resource:
    body: bytes
    content_type: str


class _Handler(BaseHTTPRequestHandler):
    server: WatchServer

    def version_string(self) -> str:
        return "benchseq-watch"

    def do_GET(self) -> None:
        if not self._host_allowed():
            self._send(403, b"refused: unexpected Host header\n", "text/plain; charset=utf-8")
            return
        route = self.path.split("?", 1)[0]
        if route == "/state.json":
            self._send(200, self.server.watcher.state_json(), "application/json; charset=utf-8")
            return
        if route in ("/", "/index.html"):
            state = json.loads(self.server.watcher.state_json())
            self._send(200, page_html(state).encode("utf-8"), "text/html; charset=utf-8")
            return
        fixed = self.server.resources.get(route)
        if fixed is None:
            self._send(404, b"not found\n", "text/plain; charset=utf-8")
            return
        self._send(200, fixed.body, fixed.content_type)

    def _refuse(self) -> None:
        body = b"read-only: only GET is answered\n"
        self._send(405, body, "text/plain; charset=utf-8", {"Allow": "GET"})

    do_POST = do_PUT = do_DELETE = do_PATCH = do_HEAD = do_OPTIONS = _refuse

    def _host_allowed(self) -> bool:
        if not self.server.loopback:
            return True
        host = (self.headers.get("Host") or "").strip().lower()
        if host.startswith("["):
            name = host[: host.find("]") + 1]
        else:
            name = host.rsplit(":", 1)[0] if host.count(":") == 1 else host
        return name in _LOOPBACK_NAMES

    def _send(
        self, code: int, body: bytes, content_type: str, extra: dict[str, str] | None = None
    ) -> None:
        self.send_response(code)
        self.send_header("Content-Type", content_type)
        self.send_header("Content-Length", str(len(body)))
        self.send_header("Cache-Control", "no-store")
        self.send_header("X-Content-Type-Options", "nosniff")
        self.send_header("Referrer-Policy", "no-referrer")
        self.send_header("Content-Security-Policy", CSP)
        for key, value in (extra or {}).items():
            self.send_header(key, value)
        self.end_headers()
        if self.command != "HEAD":
            self.wfile.write(body)

    def log_message(self, format: str, *args: Any) -> None:
        pass  # a page polling every second would fill the terminal


class WatchServer(ThreadingHTTPServer):
    """The page's HTTP server (one thread per request, daemon threads)."""

    daemon_threads = True

    def __init__(self, watcher: Watcher, host: str = "127.0.0.1", port: int = 0) -> None:
        import socket

        self.watcher = watcher
        self.address_family = socket.AF_INET6 if ":" in host else socket.AF_INET
        self.loopback = bind_warning(host) is None
        self.resources = {
            "/watch.js": _Resource(SCRIPT.encode("utf-8"), "text/javascript; charset=utf-8"),
            "/watch.css": _Resource(STYLE.encode("utf-8"), "text/css; charset=utf-8"),
        }
        super().__init__((host.strip("[]"), port), _Handler)

    def handle_error(self, request: Any, client_address: Any) -> None:
        """A browser that goes away mid-answer is normal: no traceback, one line otherwise."""
        import sys

        exc = sys.exc_info()[1]
        if isinstance(exc, ConnectionError | TimeoutError):
            return
        sys.stderr.write(f"watch: a request from {client_address[0]} failed: {exc!r}\n")

    @property
    def url(self) -> str:
        host, port = self.socket.getsockname()[:2]
        shown = f"[{host}]" if ":" in str(host) else str(host)
        return f"http://{shown}:{port}/"


def open_server(path: str | Path, host: str = "127.0.0.1", port: int = 0) -> WatchServer:
    """Read the file once (BadInput when it is missing or damaged), then bind the server
    (BadInput when the address cannot be bound). The caller runs ``serve_forever``."""
    if not 0 <= port <= 65535:
        raise BadInput(f"--port {port}: give 0 (any free port) to 65535")
    from benchseq.results import check_readable

    check_readable(path)  # a damaged file that would crash libhdf5 is refused, once
    watcher = Watcher(path)
    watcher.first()
    try:
        return WatchServer(watcher, host, port)
    except OSError as exc:
        raise BadInput(f"cannot serve on {host} port {port}: {exc.strerror or exc}") from None
