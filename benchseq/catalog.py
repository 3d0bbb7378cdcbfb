"""A campaign catalog: every result file under some folders, one row per point, in an open
Hive-partitioned Parquet dataset that DuckDB (or any Parquet reader) queries.

Layout of CATALOG_DIR (see DEVELOPERS.md, "The campaign catalog"):

    manifest.json                                    the catalogued files (the source of truth)
    points/device_key=<slug>/night=<YYYY-MM-DD>/<content-hash>.parquet   one file per run

``night`` is the date of the run's start less 12 hours (in the start time's own offset), so a
run started at 22:00 and one started at 03:00 the next morning share a night. ``device_key``
is the device name reduced to a path-safe slug; the full name is the ``device`` column.

Building is incremental: a file whose content (HDF5 file + journal, sha256) is already
catalogued is skipped; a changed one (a resumed run) replaces its rows. New Parquet files are
written under temporary names and renamed; the manifest is replaced atomically and lists the
only files a query reads, so an interrupted build never shows half a run. Damaged result
files are named and skipped. DuckDB is an optional dependency (the ``catalog`` extra),
imported only here and only when a catalog is built or queried.
"""

from __future__ import annotations

import datetime as dt
import hashlib
import json
import math
import os
import re
import uuid
import warnings
from collections.abc import Callable, Iterable, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from benchseq.errors import BadInput

MANIFEST = "manifest.json"
POINTS_DIR = "points"
FORMAT = "benchseq-catalog"
FORMAT_VERSION = 1
NIGHT_SHIFT = dt.timedelta(hours=12)  # a night runs from noon to noon
EXTRA_HINT = "pip install 'benchseq[catalog]'"

# The columns of every Parquet file, in order, with their SQL types (the partition columns
# device_key and night live in the directory names only).
RUN_COLUMNS: tuple[tuple[str, str], ...] = (
    ("source", "VARCHAR"),  # absolute path of the result file
    ("source_sha256", "VARCHAR"),  # content hash of the file and its journal
    ("run_id", "VARCHAR"),
    ("started", "TIMESTAMP"),  # UTC
    ("status", "VARCHAR"),  # as `show` says: complete, stopped, aborted, interrupted, running
    ("partial", "BOOLEAN"),  # fewer points stored than planned
    ("points_stored", "BIGINT"),
    ("points_planned", "BIGINT"),
    ("title", "VARCHAR"),
    ("operator", "VARCHAR"),
    ("device", "VARCHAR"),
    ("lab", "VARCHAR"),  # the bench's name
    ("bench_source", "VARCHAR"),
    ("bench_sha256", "VARCHAR"),
    ("plan_source", "VARCHAR"),
    ("plan_sha256", "VARCHAR"),
    ("simulated", "BOOLEAN"),
)
POINT_COLUMNS: tuple[tuple[str, str], ...] = (
    ("point_id", "BIGINT"),
    ("repeat_of", "BIGINT"),
    ("ripple_factor", "DOUBLE"),
    ("frequency_planned", "DOUBLE"),
    ("frequency", "DOUBLE"),
    ("frequency_fitted", "DOUBLE"),
    ("ripple_target", "DOUBLE"),
    ("ripple_convention", "VARCHAR"),
    ("dc_level", "DOUBLE"),
    ("load_current", "DOUBLE"),
    ("pin_dc", "DOUBLE"),
    ("supply_current", "DOUBLE"),
    ("rejection_db", "DOUBLE"),
    ("uncertainty_db", "DOUBLE"),
    ("is_bound", "BOOLEAN"),
    ("bound_db", "DOUBLE"),
    ("rejection_input_db", "DOUBLE"),
    ("bound_input_db", "DOUBLE"),
    ("flags", "VARCHAR"),
    ("started_at", "DOUBLE"),
    ("stored_at", "DOUBLE"),
)
COLUMNS = RUN_COLUMNS + POINT_COLUMNS
PARTITION_COLUMNS = (("device_key", "VARCHAR"), ("night", "DATE"))
SUMMARIES = ("runs", "worst", "flags")


def _duckdb() -> Any:
    try:
        import duckdb
    except ModuleNotFoundError:
        raise BadInput(
            f"the campaign catalog needs the optional DuckDB package: {EXTRA_HINT}"
        ) from None
    return duckdb


# -- the manifest ------------------------------------------------------------------------
@dataclass
class Entry:
    """One catalogued result file."""

    sha256: str
    parquet: str  # relative to the catalog directory
    run_id: str
    status: str
    partial: bool
    rows: int
    device: str
    night: str

    def to_json(self) -> dict[str, Any]:
        return dict(self.__dict__)


def _load_manifest(into: Path) -> dict[str, Entry]:
    path = into / MANIFEST
    if not path.exists():
        if into.is_dir() and any(p.name != POINTS_DIR for p in into.iterdir()):
            raise BadInput(
                f"{into} is neither empty nor a benchseq catalog (no {MANIFEST}); "
                "give a new or empty folder"
            )
        return {}
    try:
        data = json.loads(path.read_text(encoding="utf-8"))
        if data.get("format") != FORMAT:
            raise ValueError(f"format is {data.get('format')!r}, not {FORMAT!r}")
        return {source: Entry(**item) for source, item in data["files"].items()}
    except (OSError, ValueError, TypeError, KeyError, AttributeError) as exc:
        raise BadInput(f"{path}: not a readable catalog manifest ({exc})") from None


def _write_manifest(into: Path, entries: dict[str, Entry]) -> None:
    data = {
        "format": FORMAT,
        "version": FORMAT_VERSION,
        "updated": dt.datetime.now(dt.UTC).isoformat(timespec="seconds"),
        "files": {source: entries[source].to_json() for source in sorted(entries)},
    }
    tmp = into / f".{MANIFEST}.{uuid.uuid4().hex}.tmp"
    with open(tmp, "w", encoding="utf-8") as handle:
        json.dump(data, handle, indent=1)
        handle.flush()
        os.fsync(handle.fileno())
    os.replace(tmp, into / MANIFEST)


# -- finding and reading result files ----------------------------------------------------
def _candidates(dirs: Iterable[Path], into: Path) -> list[Path]:
    """Every result file under ``dirs`` (an ``X.h5``, or the journal of a missing one)."""
    found: set[Path] = set()
    skip = into.resolve()
    for root in dirs:
        for path in root.rglob("*.h5*"):
            if skip == path or skip in path.parents:
                continue
            if path.name.endswith(".h5"):
                found.add(path.resolve())
            elif path.name.endswith(".h5.journal"):
                found.add(path.with_name(path.name.removesuffix(".journal")).resolve())
    return sorted(found)


def content_hash(path: Path) -> str:
    """sha256 over the HDF5 file and its journal (either may be missing)."""
    outer = hashlib.sha256()
    for part, label in ((path, b"h5"), (path.with_name(path.name + ".journal"), b"journal")):
        inner = hashlib.sha256()
        if part.is_file():
            with open(part, "rb") as handle:
                while block := handle.read(1 << 20):
                    inner.update(block)
            outer.update(label + b":" + inner.digest())
    return outer.hexdigest()


def night_of(started: dt.datetime) -> dt.date:
    """The night a run belongs to: its start's date less 12 hours (noon to noon)."""
    return (started - NIGHT_SHIFT).date()


def device_key(name: str) -> str:
    """A path-safe partition value for a device name (lower case, dashes, at most 48 chars)."""
    slug = re.sub(r"[^a-z0-9]+", "-", name.lower()).strip("-")
    if not slug or len(slug) > 48:
        digest = hashlib.sha256(name.encode("utf-8")).hexdigest()[:8]
        slug = f"{slug[:39].rstrip('-')}-{digest}".lstrip("-")
    return slug


def _started(meta: dict[str, Any], path: Path) -> dt.datetime:
    text = meta.get("started")
    try:
        when = dt.datetime.fromisoformat(str(text))
    except ValueError:
        when = dt.datetime.fromtimestamp(path.stat().st_mtime, dt.UTC)
    return when if when.tzinfo is not None else when.replace(tzinfo=dt.UTC)


def _text(value: Any) -> str | None:
    return None if value is None else str(value)


def read_run(path: Path, sha: str) -> tuple[Any, dict[str, Any], list[str]]:
    """The catalog rows of one result file (a pandas DataFrame with COLUMNS), the file's
    metadata items the catalog keeps, and what reading it noticed (partial damage)."""
    import numpy as np
    import pandas as pd

    from benchseq.results import ResultWarning, check_readable, read_meta, read_results

    check_readable(path)  # a file that would crash libhdf5 is skipped, not the build ended
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always", ResultWarning)
        meta = read_meta(path)
        frame = read_results(path)
    notices = list(dict.fromkeys(str(w.message) for w in caught if w.category is ResultWarning))
    started = _started(meta, path)
    stored = len(frame)
    planned = meta.get("point_count")
    planned = int(planned) if isinstance(planned, int | float) and math.isfinite(planned) else None
    status = str(meta.get("status") or "unknown")
    run = {
        "source": str(path),
        "source_sha256": sha,
        "run_id": _text(meta.get("run_id")),
        "started": started.astimezone(dt.UTC).replace(tzinfo=None).isoformat(),
        "status": status,
        "partial": planned is not None and stored < planned,
        "points_stored": stored,
        "points_planned": planned,
        "title": _text(meta.get("title")),
        "operator": _text(meta.get("operator")),
        "device": str(meta.get("device") or "unknown device"),
        "lab": _text(meta.get("bench_name")),
        "bench_source": _text(meta.get("bench_source")),
        "bench_sha256": _text(meta.get("bench_sha256")),
        "plan_source": _text(meta.get("plan_source")),
        "plan_sha256": _text(meta.get("plan_sha256")),
        "simulated": bool(meta.get("simulated", False)),
    }
    data: dict[str, Any] = {}
    for name, _ in RUN_COLUMNS:
        data[name] = [run[name]] * stored
    for name, sql in POINT_COLUMNS:
        if name in frame.columns:
            values = frame[name].to_numpy()
            data[name] = values.astype(object) if sql in ("VARCHAR", "BOOLEAN") else values
        else:
            data[name] = np.full(stored, None, dtype=object)
    rows = pd.DataFrame(data, columns=[name for name, _ in COLUMNS])
    items = {
        "run_id": run["run_id"] or "",
        "status": status,
        "partial": bool(run["partial"]),
        "device": run["device"],
        "night": night_of(started).isoformat(),
    }
    return rows, items, notices


def _select_list() -> str:
    """The SELECT list that casts every column to its catalog type (NaN -> NULL)."""
    parts = []
    for name, sql in COLUMNS:
        value = f'"{name}"'
        if sql == "DOUBLE":
            value = f"NULLIF(CAST({value} AS DOUBLE), 'NaN'::DOUBLE)"
        parts.append(f'CAST({value} AS {sql}) AS "{name}"')
    return ", ".join(parts)


def _sql_text(text: str) -> str:
    return "'" + text.replace("'", "''") + "'"


# -- building ----------------------------------------------------------------------------
@dataclass
class BuildReport:
    catalog: str
    found: int = 0
    added: list[str] = field(default_factory=list)
    replaced: list[str] = field(default_factory=list)
    unchanged: int = 0
    duplicates: list[tuple[str, str]] = field(default_factory=list)  # (file, same as)
    not_runs: list[str] = field(default_factory=list)  # calibration files
    skipped: list[tuple[str, str]] = field(default_factory=list)  # (file, why)
    notices: list[tuple[str, str]] = field(default_factory=list)  # (file, what)
    rows_written: int = 0
    files: int = 0
    rows: int = 0
    incomplete_runs: int = 0

    def to_dict(self) -> dict[str, Any]:
        return {
            "catalog": self.catalog,
            "found": self.found,
            "added": self.added,
            "replaced": self.replaced,
            "unchanged": self.unchanged,
            "duplicates": [{"file": a, "same_as": b} for a, b in self.duplicates],
            "calibration_files": self.not_runs,
            "skipped": [{"file": a, "reason": b} for a, b in self.skipped],
            "notices": [{"file": a, "notice": b} for a, b in self.notices],
            "rows_written": self.rows_written,
            "catalogued_files": self.files,
            "catalogued_rows": self.rows,
            "incomplete_runs": self.incomplete_runs,
        }


def _clean_orphans(into: Path, entries: dict[str, Entry]) -> None:
    """Remove Parquet files no manifest entry names and temporary files (an earlier build
    that stopped half-way)."""
    listed = {e.parquet for e in entries.values()}
    root = into / POINTS_DIR
    if root.is_dir():
        for path in root.rglob("*"):
            rel = path.relative_to(into).as_posix()
            if path.is_file() and (path.name.endswith(".tmp") or rel not in listed):
                path.unlink()
    for path in into.glob(f".{MANIFEST}.*.tmp"):
        path.unlink()


def build(
    dirs: Sequence[str | Path],
    into: str | Path,
    *,
    on_file: Callable[[int, int], None] | None = None,
) -> BuildReport:
    """Catalogue every result file under ``dirs`` into ``into`` (see the module text)."""
    roots = [Path(d) for d in dirs]
    for root in roots:
        if not root.is_dir():
            raise BadInput(f"{root}: no such folder")
    into = Path(into)
    if into.exists() and not into.is_dir():
        raise BadInput(f"{into}: exists and is not a folder")
    duckdb = _duckdb()
    entries = _load_manifest(into)
    into.mkdir(parents=True, exist_ok=True)
    _clean_orphans(into, entries)
    report = BuildReport(str(into))
    by_hash = {e.sha256: source for source, e in entries.items()}
    candidates = _candidates(roots, into)
    report.found = len(candidates)
    con = duckdb.connect()
    stale: list[Path] = []
    try:
        for number, path in enumerate(candidates, 1):
            if on_file is not None:
                on_file(number, len(candidates))
            source = str(path)
            try:
                sha = content_hash(path)
            except OSError as exc:
                report.skipped.append((source, f"cannot be read ({exc.strerror or exc})"))
                continue
            old = entries.get(source)
            if old is not None and old.sha256 == sha:
                report.unchanged += 1
                continue
            if sha in by_hash and by_hash[sha] != source:
                report.duplicates.append((source, by_hash[sha]))
                continue
            written = _catalogue_one(con, into, path, sha, report)
            if written is None:
                continue
            entries[source] = written
            by_hash[sha] = source
            if old is not None:
                report.replaced.append(source)
                if old.parquet != written.parquet:
                    stale.append(into / old.parquet)
            else:
                report.added.append(source)
            report.rows_written += written.rows
    finally:
        con.close()
        _write_manifest(into, entries)
        for path in stale:
            path.unlink(missing_ok=True)
            _prune_empty(path.parent, into / POINTS_DIR)
    report.files = len(entries)
    report.rows = sum(e.rows for e in entries.values())
    report.incomplete_runs = sum(1 for e in entries.values() if e.partial or e.status != "complete")
    return report


def _prune_empty(folder: Path, stop: Path) -> None:
    while folder != stop and stop in folder.parents:
        try:
            folder.rmdir()
        except OSError:
            return
        folder = folder.parent


def _catalogue_one(con: Any, into: Path, path: Path, sha: str, report: BuildReport) -> Entry | None:
    """Write one result file's rows as a Parquet file; None (with the reason in the report)
    when the file cannot be read."""
    source = str(path)
    try:
        rows, items, notices = read_run(path, sha)
    except Exception as exc:  # a damaged or foreign file never stops the build
        from benchseq.overview import is_calibration_file

        if path.is_file() and is_calibration_file(source):
            report.not_runs.append(source)
        else:
            report.skipped.append((source, _reason(exc)))
        return None
    report.notices += [(source, n) for n in notices]
    folder = (
        Path(POINTS_DIR) / f"device_key={device_key(items['device'])}" / f"night={items['night']}"
    )
    rel = (folder / f"{sha[:32]}.parquet").as_posix()
    target = into / rel
    target.parent.mkdir(parents=True, exist_ok=True)
    tmp = target.with_name(f".{target.name}.{uuid.uuid4().hex}.tmp")
    con.register("run_rows", rows)
    try:
        con.execute(
            f"COPY (SELECT {_select_list()} FROM run_rows) TO {_sql_text(str(tmp))} "
            "(FORMAT PARQUET)"
        )
    finally:
        con.unregister("run_rows")
    os.replace(tmp, target)
    return Entry(sha, rel, items["run_id"], items["status"], items["partial"], len(rows),
                 items["device"], items["night"])  # fmt: skip


def _reason(exc: BaseException) -> str:
    text = str(exc).strip() or type(exc).__name__
    return text if isinstance(exc, BadInput) else f"{type(exc).__name__}: {text}"


# -- querying ----------------------------------------------------------------------------
def connect(catalog: str | Path) -> Any:
    """A DuckDB connection with the views ``points`` (one row per point, partition columns
    device_key and night included) and ``runs`` (one row per catalogued file)."""
    into = Path(catalog)
    if not (into / MANIFEST).is_file():
        raise BadInput(f"{into}: not a benchseq catalog (no {MANIFEST}); build one first")
    entries = _load_manifest(into)
    duckdb = _duckdb()
    con = duckdb.connect()
    files = [str(into / e.parquet) for e in entries.values()]
    if files:
        listing = "[" + ", ".join(_sql_text(f) for f in sorted(files)) + "]"
        con.execute(
            f"CREATE VIEW points AS SELECT * FROM read_parquet({listing}, "
            "hive_partitioning = true, hive_types = {'device_key': VARCHAR, 'night': DATE})"
        )
    else:
        empty = ", ".join(
            f'CAST(NULL AS {sql}) AS "{name}"' for name, sql in COLUMNS + PARTITION_COLUMNS
        )
        con.execute(f"CREATE VIEW points AS SELECT {empty} WHERE false")
    con.execute(
        "CREATE VIEW runs AS SELECT source, any_value(run_id) AS run_id, "
        "any_value(started) AS started, any_value(night) AS night, "
        "any_value(device) AS device, any_value(lab) AS lab, any_value(status) AS status, "
        "any_value(partial) AS partial, count(*) AS points, "
        "any_value(points_planned) AS planned, "
        "count(*) FILTER (WHERE is_bound) AS bounds, "
        "count(*) FILTER (WHERE flags <> '') AS flagged FROM points GROUP BY source"
    )
    return con


@dataclass
class Table:
    """A query's answer: column names and rows of plain Python values."""

    title: str
    columns: list[str]
    rows: list[tuple[Any, ...]]

    def records(self) -> list[dict[str, Any]]:
        return [{c: _plain(v) for c, v in zip(self.columns, row, strict=True)} for row in self.rows]


def _plain(value: Any) -> Any:
    if isinstance(value, float) and not math.isfinite(value):
        return None
    if isinstance(value, dt.date | dt.datetime):
        return value.isoformat()
    if isinstance(value, int | float | str | bool) or value is None:
        return value
    if hasattr(value, "__float__"):
        return float(value)
    return str(value)


def run_sql(con: Any, sql: str, title: str = "query") -> Table:
    duckdb = _duckdb()
    try:
        cursor = con.execute(sql)
        if cursor.description is None:
            return Table(title, [], [])
        columns = [d[0] for d in cursor.description]
        return Table(title, columns, [tuple(r) for r in cursor.fetchall()])
    except duckdb.Error as exc:
        raise BadInput(f"SQL: {str(exc).strip()}") from None


@dataclass
class Filters:
    """What `worst` looks at: one frequency (each run's nearest planned one) or a band, and
    optional operating point, device, lab and night filters."""

    frequency: float | None = None
    band: tuple[float, float] | None = None
    dc_level: float | None = None
    load_current: float | None = None
    device: str | None = None
    lab: str | None = None
    night: str | None = None
    tolerance: float = 1e-6  # relative, for the operating point filters


def _where(f: Filters) -> list[str]:
    where = []
    if f.band is not None:
        lo, hi = sorted(f.band)
        where.append(f"frequency_planned BETWEEN {lo!r} AND {hi!r}")
    for column, value in (("dc_level", f.dc_level), ("load_current", f.load_current)):
        if value is not None:
            slack = max(abs(value) * f.tolerance, 1e-12)
            where.append(f"abs({column} - {value!r}) <= {slack!r}")
    if f.device is not None:
        where.append(f"contains(lower(device), lower({_sql_text(f.device)}))")
    if f.lab is not None:
        where.append(f"contains(lower(lab), lower({_sql_text(f.lab)}))")
    if f.night is not None:
        try:
            dt.date.fromisoformat(f.night)
        except ValueError:
            raise BadInput(f"--night {f.night}: not a date (YYYY-MM-DD)") from None
        where.append(f"night = CAST({_sql_text(f.night)} AS DATE)")
    return where


def summary(con: Any, name: str, filters: Filters | None = None) -> Table:
    """One of the named summaries (SUMMARIES) as a Table."""
    f = filters or Filters()
    if name == "runs":
        where = _where(Filters(device=f.device, lab=f.lab, night=f.night))
        clause = f"WHERE {' AND '.join(where)}" if where else ""
        return run_sql(
            con,
            "SELECT night, device, lab, status, partial, points, planned, bounds, flagged, "
            f"started, source FROM runs {clause} "
            "ORDER BY night, device, started, source",
            "runs",
        )
    if name == "flags":
        where = ["flags <> ''", *_where(f)]
        return run_sql(
            con,
            "SELECT lab, flag, count(*) AS points, count(DISTINCT source) AS runs FROM "
            f"(SELECT lab, source, unnest(string_split(flags, ' ')) AS flag FROM points "
            f"WHERE {' AND '.join(where)}) WHERE flag <> '' GROUP BY lab, flag "
            "ORDER BY lab, points DESC, flag",
            "flags per bench",
        )
    if name == "worst":
        return run_sql(con, worst_sql(f), "worst rejection per device, bench and night")
    raise BadInput(f"unknown summary {name!r}; one of: {', '.join(SUMMARIES)}")


def worst_sql(f: Filters) -> str:
    """Lowest measured rejection per device, lab and night among the points the filters
    keep; at ``f.frequency`` each run contributes its points at its planned frequency nearest
    to it (log distance), chosen before lower bounds are set aside: bounds are not values,
    the lowest of them is given beside the worst value."""
    if f.frequency is None and f.band is None:
        raise BadInput("worst needs --frequency F or --band LOW HIGH")
    where = _where(f)
    chosen = "SELECT * FROM points" + (f" WHERE {' AND '.join(where)}" if where else "")
    if f.frequency is not None:
        chosen += (
            f" QUALIFY abs(ln(frequency_planned / {f.frequency!r})) = "
            f"min(abs(ln(frequency_planned / {f.frequency!r}))) OVER (PARTITION BY source)"
        )
    value = "(NOT is_bound AND rejection_db IS NOT NULL)"
    return (
        "SELECT device, lab, night, min(rejection_db) AS worst_db, "
        "arg_min(uncertainty_db, rejection_db) AS u_db, "
        "arg_min(frequency_planned, rejection_db) AS frequency_planned, "
        "arg_min(dc_level, rejection_db) AS dc_level, "
        "arg_min(load_current, rejection_db) AS load_current, "
        "arg_min(point_id, rejection_db) AS point_id, "
        "min(bound_db) FILTER (WHERE is_bound) AS lowest_bound_db, "
        "count(DISTINCT source) AS runs, arg_min(source, rejection_db) AS source "
        f"FROM ({chosen}) WHERE {value} OR is_bound GROUP BY device, lab, night "
        "ORDER BY device, lab, night"
    )
