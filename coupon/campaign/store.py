"""The campaign store: one SQLite file (standard library :mod:`sqlite3`, WAL mode).

A campaign folder ``DIR`` holds ``DIR/coupon.db`` (the default; any path works).
Every command that analyses an image calls :func:`record_results` once per image
with the rows it also writes to its CSVs; a rerun of the same image by the same
command replaces that image's rows in one transaction, so the database never
holds duplicates, and an exception half-way leaves it exactly as it was.

Schema (``schema_version`` 1)
-----------------------------
``meta(key, value)``
    ``schema_version``, ``campaign_name``, ``lab``, ``created``, ``tool_version``,
    ``schedule_h`` (JSON list of planned inspection times in hours, may be empty).
``systems(system_id, name, notes)``
    Coating systems or surface treatments.
``specimens(specimen_id, system_id, replicate, kind, row, col, notes)``
    Panels, coupons and droplet samples; ``kind`` is ``panel``, ``coupon`` or ``droplet``.
``inspections(inspection_id, command, image, image_sha256, exposure_h, specimen_id,
series, settings_json, profile_sha256, tool_version, analysed_at)``
    One row per (command, image) pair, unique: analysing an image again replaces it.
    ``analysed_at`` is UTC ISO 8601.
``results(row_id, inspection_id, table_name, seq, specimen_id, exposure_h, t_min,
item, status, data_json)``
    A generic row store: every measurement row exactly as the command produced it,
    as JSON (``data_json``; NaN and inf are stored as null, read back as NaN), plus
    typed key columns copied from the row for indexing and joins.  ``table_name`` is
    one of :data:`TABLES`; ``seq`` keeps the row order.  Rows are deleted with their
    inspection (foreign key, ``ON DELETE CASCADE``).

Why a generic row store: the commands' columns are documented in their issues and
may grow; storing each row's full JSON keeps every column faithfully without a
schema migration per new column, while the key columns keep queries fast.
:func:`read_table` rebuilds the CSV-shaped table (documented columns first).

Concurrency: WAL mode lets readers read a consistent snapshot while one writer
writes; writers take the write lock at ``BEGIN IMMEDIATE`` and wait up to
``busy_timeout`` (30 s) for each other.
"""

from __future__ import annotations

import datetime as _dt
import json
import math
import re
import sqlite3
from contextlib import contextmanager
from pathlib import Path
from typing import Iterable, Iterator, Mapping

import numpy as np

from coupon import __version__
from coupon.errors import CouponError

SCHEMA_VERSION = 1
DEFAULT_DB_NAME = "coupon.db"
BUSY_TIMEOUT_MS = 30_000

#: Documented columns of every table a command stores (issues 3, 4 and 5), in CSV order.
TABLES: dict[str, tuple[str, ...]] = {
    "panels": (
        "image", "panel_id", "position", "exposure_h", "x_px", "y_px", "rated_area_mm2", "rust_area_mm2",
        "rust_area_pct", "rust_area_pct_unc", "rust_sites", "rust_grade", "rust_distribution", "ri_degree",
        "scribe_found", "creep_mean_mm", "creep_max_mm", "creep_min_mm", "creep_rating", "overlay", "status",
    ),
    "pits": ("image", "pit_id", "x_mm", "y_mm", "area_mm2", "eq_diameter_mm", "major_mm", "minor_mm", "depth_mm"),
    "pit_summary": (
        "image", "analysed_area_mm2", "pit_count", "density_per_m2", "mean_area_mm2", "median_area_mm2",
        "max_area_mm2", "pitted_area_pct", "clark_evans_r", "g46_density", "g46_size", "g46_depth", "max_depth_mm",
        "corrosion_rate_mm_y", "corrosion_rate_mpy", "pitting_factor", "overlay", "status",
    ),
    "droplet": (
        "frame", "t_min", "drop_found", "drop_area_mm2", "drop_diameter_mm", "ph_median", "ph_p05", "ph_p95",
        "ph_centre", "ph_rim", "acidic_area_mm2", "acidic_area_pct", "basic_area_mm2", "basic_area_pct",
        "rust_area_mm2", "rust_area_pct", "indicator_coverage_pct",
    ),
    "radial_profile": ("frame", "t_min", "r_norm", "ph_median", "n_px"),
    # droplet_summary.json (one row per series); its keys are the droplet command's own.
    "droplet_summary": (),
}

#: Which tables each command may write.
COMMAND_TABLES: dict[str, tuple[str, ...]] = {
    "panels": ("panels",),
    "pits": ("pits", "pit_summary"),
    "droplet": ("droplet", "radial_profile", "droplet_summary"),
}

#: Inspection columns added to every table read back (prefixed where a row might use the name).
META_COLUMNS = ("specimen_id", "inspection_id", "command", "inspection_image", "image_sha256",
                "inspection_exposure_h", "inspection_series", "profile_sha256", "tool_version", "analysed_at")

SPECIMEN_KINDS = ("panel", "coupon", "droplet")

_SCHEMA = """
CREATE TABLE IF NOT EXISTS meta (key TEXT PRIMARY KEY, value TEXT);
CREATE TABLE IF NOT EXISTS systems (
    system_id TEXT PRIMARY KEY, name TEXT, notes TEXT);
CREATE TABLE IF NOT EXISTS specimens (
    specimen_id TEXT PRIMARY KEY, system_id TEXT REFERENCES systems(system_id),
    replicate INTEGER, kind TEXT NOT NULL DEFAULT 'panel', row INTEGER, col INTEGER, notes TEXT);
CREATE TABLE IF NOT EXISTS inspections (
    inspection_id INTEGER PRIMARY KEY, command TEXT NOT NULL, image TEXT NOT NULL, image_sha256 TEXT,
    exposure_h REAL, specimen_id TEXT, series TEXT, settings_json TEXT NOT NULL, profile_sha256 TEXT,
    tool_version TEXT NOT NULL, analysed_at TEXT NOT NULL, UNIQUE (command, image));
CREATE TABLE IF NOT EXISTS results (
    row_id INTEGER PRIMARY KEY,
    inspection_id INTEGER NOT NULL REFERENCES inspections(inspection_id) ON DELETE CASCADE,
    table_name TEXT NOT NULL, seq INTEGER NOT NULL, specimen_id TEXT, exposure_h REAL, t_min REAL,
    item TEXT, status TEXT, data_json TEXT NOT NULL);
CREATE INDEX IF NOT EXISTS results_by_table ON results (table_name, specimen_id);
CREATE INDEX IF NOT EXISTS results_by_inspection ON results (inspection_id);
"""


class StoreError(CouponError):
    """The campaign database is missing, of another schema version, or was given rows it cannot store."""


def _now() -> str:
    return _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds")


# -- JSON of one row -----------------------------------------------------------

def _clean(value, where: str):
    """A JSON-able copy of ``value``: numpy scalars to Python, NaN/inf/NA to None."""
    if value is None or isinstance(value, (str, bool)):
        return value
    if isinstance(value, int):
        return value
    if isinstance(value, float):
        return value if math.isfinite(value) else None
    if isinstance(value, np.generic):
        return _clean(value.item(), where)
    if isinstance(value, Path):
        return str(value)
    if isinstance(value, Mapping):
        return {str(k): _clean(v, f"{where}.{k}") for k, v in value.items()}
    if isinstance(value, (list, tuple, np.ndarray)):
        return [_clean(v, where) for v in list(value)]
    if isinstance(value, (_dt.datetime, _dt.date)):
        return value.isoformat()
    try:  # pandas missing values (pd.NA, pd.NaT) without importing pandas here
        import pandas as pd

        if isinstance(value, pd.Timestamp):
            return None if pd.isna(value) else value.isoformat()
        if pd.isna(value) is True:
            return None
    except (ImportError, TypeError, ValueError):
        pass
    raise StoreError(f"{where}: a {type(value).__name__} cannot be stored (expected a number, text, "
                     f"true/false, empty, or a list or mapping of those)")


def row_json(row: Mapping, where: str) -> str:
    if not isinstance(row, Mapping):
        raise StoreError(f"{where}: expected a row as a mapping of column to value, got a {type(row).__name__}")
    return json.dumps(_clean(row, where), allow_nan=False, separators=(",", ":"))


def _num(value) -> float | None:
    try:
        f = float(value)
    except (TypeError, ValueError):
        return None
    return f if math.isfinite(f) else None


def _text(value) -> str | None:
    if value is None or (isinstance(value, float) and not math.isfinite(value)):
        return None
    return str(value)


def _row_specimen(row: Mapping) -> str | None:
    for key in ("specimen_id", "panel_id", "coupon_id"):
        v = _text(row.get(key))
        if v:
            return v
    return None


def _row_item(table: str, row: Mapping) -> str | None:
    key = {"panels": "panel_id", "pits": "pit_id", "droplet": "frame", "radial_profile": "r_norm"}.get(table)
    return _text(row.get(key)) if key else None


# -- the store -------------------------------------------------------------------

class CampaignStore:
    """An open campaign database.  Use :func:`open_store`; close it (or use ``with``)."""

    def __init__(self, conn: sqlite3.Connection, path: Path):
        self.conn = conn
        self.path = path
        self._depth = 0

    def __enter__(self) -> "CampaignStore":
        return self

    def __exit__(self, *exc) -> None:
        self.close()

    def close(self) -> None:
        self.conn.close()

    @contextmanager
    def transaction(self) -> Iterator["CampaignStore"]:
        """All writes inside happen together or not at all (``BEGIN IMMEDIATE`` ... ``COMMIT``)."""
        if self._depth:
            self._depth += 1
            try:
                yield self
            finally:
                self._depth -= 1
            return
        self.conn.execute("BEGIN IMMEDIATE")
        self._depth = 1
        try:
            yield self
        except BaseException:
            self.conn.execute("ROLLBACK")
            raise
        else:
            self.conn.execute("COMMIT")
        finally:
            self._depth = 0

    # -- meta ---------------------------------------------------------------
    def meta(self) -> dict[str, str]:
        return {k: v for k, v in self.conn.execute("SELECT key, value FROM meta")}

    def set_meta(self, **values) -> None:
        with self.transaction():
            for k, v in values.items():
                self.conn.execute("INSERT OR REPLACE INTO meta (key, value) VALUES (?, ?)",
                                  (k, v if isinstance(v, str) else json.dumps(v)))

    def schedule_h(self) -> list[float]:
        raw = self.meta().get("schedule_h")
        return [float(v) for v in json.loads(raw)] if raw else []

    # -- layout -------------------------------------------------------------
    def set_layout(self, specimens: Iterable[Mapping], systems: Iterable[Mapping] = ()) -> int:
        """Insert or replace specimens (and their systems); measurement rows are kept.

        Each specimen mapping has ``specimen_id``, ``system`` and optionally ``replicate``,
        ``kind``, ``row``, ``col``, ``notes``.  Returns the number of specimens written.
        """
        specimens = list(specimens)
        names = {str(s["system_id"]): s for s in systems}
        n = 0
        with self.transaction():
            for sys_id in sorted({str(s["system"]) for s in specimens} | set(names)):
                info = names.get(sys_id, {})
                self.conn.execute("INSERT OR REPLACE INTO systems (system_id, name, notes) VALUES (?, ?, ?)",
                                  (sys_id, _text(info.get("name")) or sys_id, _text(info.get("notes"))))
            for s in specimens:
                kind = _text(s.get("kind")) or "panel"
                if kind not in SPECIMEN_KINDS:
                    raise StoreError(f"specimen {s['specimen_id']!r}: kind {kind!r} is invalid, it must be one "
                                     f"of {list(SPECIMEN_KINDS)}")
                rep, row, col = (_num(s.get(k)) for k in ("replicate", "row", "col"))
                self.conn.execute(
                    "INSERT OR REPLACE INTO specimens (specimen_id, system_id, replicate, kind, row, col, notes) "
                    "VALUES (?, ?, ?, ?, ?, ?, ?)",
                    (str(s["specimen_id"]), str(s["system"]), None if rep is None else int(rep), kind,
                     None if row is None else int(row), None if col is None else int(col), _text(s.get("notes"))))
                n += 1
        return n

    # -- results ------------------------------------------------------------
    def replace_results(self, command: str, image_path: str | Path, image_sha256: str | None, settings: Mapping,
                        profile_sha256: str | None, tables: Mapping[str, list[Mapping]], *,
                        exposure_h: float | None = None, specimen_id: str | None = None,
                        series: str | None = None, tool_version: str | None = None,
                        analysed_at: str | None = None) -> int:
        """Replace the rows of ``image_path`` for ``command`` (see :func:`record_results`)."""
        if command not in COMMAND_TABLES:
            raise StoreError(f"command {command!r} is invalid, it must be one of {sorted(COMMAND_TABLES)}")
        allowed = COMMAND_TABLES[command]
        for name in tables:
            if name not in allowed:
                raise StoreError(f"table {name!r} is invalid for {command!r}, it must be one of {list(allowed)}")
        image = str(image_path)
        settings_text = row_json(dict(settings or {}), f"{image}: settings")
        rows_json = {name: [row_json(r, f"{image}: {name} row {i}") for i, r in enumerate(rows)]
                     for name, rows in tables.items()}
        if exposure_h is None:
            for rows in tables.values():
                hs = [_num(r.get("exposure_h")) for r in rows if isinstance(r, Mapping)]
                hs = [h for h in hs if h is not None]
                if hs:
                    exposure_h = hs[0]
                    break
        with self.transaction():
            self.conn.execute("DELETE FROM inspections WHERE command = ? AND image = ?", (command, image))
            cur = self.conn.execute(
                "INSERT INTO inspections (command, image, image_sha256, exposure_h, specimen_id, series, "
                "settings_json, profile_sha256, tool_version, analysed_at) VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, ?)",
                (command, image, image_sha256, _num(exposure_h), specimen_id, series, settings_text,
                 profile_sha256, tool_version or __version__, analysed_at or _now()))
            insp = int(cur.lastrowid)
            for name, rows in tables.items():
                self.conn.executemany(
                    "INSERT INTO results (inspection_id, table_name, seq, specimen_id, exposure_h, t_min, item, "
                    "status, data_json) VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?)",
                    [(insp, name, i, specimen_id or _row_specimen(r),
                      _num(r.get("exposure_h")) if r.get("exposure_h") is not None else _num(exposure_h),
                      _num(r.get("t_min")), _row_item(name, r), _text(r.get("status")), js)
                     for i, (r, js) in enumerate(zip(rows, rows_json[name]))])
        return insp

    def delete_results(self, command: str, image_path: str | Path) -> int:
        with self.transaction():
            cur = self.conn.execute("DELETE FROM inspections WHERE command = ? AND image = ?",
                                    (command, str(image_path)))
        return cur.rowcount

    def count_rows(self, table: str | None = None) -> int:
        if table is None:
            return int(self.conn.execute("SELECT COUNT(*) FROM results").fetchone()[0])
        return int(self.conn.execute("SELECT COUNT(*) FROM results WHERE table_name = ?", (table,)).fetchone()[0])

    # -- reading ------------------------------------------------------------
    def systems(self):
        import pandas as pd

        return pd.read_sql_query("SELECT system_id, name, notes FROM systems ORDER BY system_id", self.conn)

    def specimens(self):
        import pandas as pd

        df = pd.read_sql_query("SELECT s.specimen_id, s.system_id AS system, y.name AS system_name, s.replicate, "
                               "s.kind, s.row, s.col, s.notes FROM specimens s LEFT JOIN systems y "
                               "ON s.system_id = y.system_id ORDER BY s.system_id, s.replicate, s.specimen_id",
                               self.conn)
        for c in ("replicate", "row", "col"):
            df[c] = df[c].astype("Int64")
        return df

    def inspections(self):
        import pandas as pd

        return pd.read_sql_query(
            "SELECT i.inspection_id, i.command, i.image, i.image_sha256, i.exposure_h, i.specimen_id, i.series, "
            "i.settings_json, i.profile_sha256, i.tool_version, i.analysed_at, "
            "(SELECT COUNT(*) FROM results r WHERE r.inspection_id = i.inspection_id) AS n_rows "
            "FROM inspections i ORDER BY i.command, i.exposure_h, i.image", self.conn)

    def table(self, name: str):
        """One measurement table as a DataFrame, CSV-shaped, plus :data:`META_COLUMNS`.

        Columns: the documented columns of ``name`` (always present, even with no rows),
        any further columns the rows carried (in first-seen order), then the inspection
        columns.  ``specimen_id`` is the stored one (from the command or the row's
        ``panel_id``/``specimen_id``), or else the one specimen whose ID appears as a
        whole word in the image's file name or folder name.
        """
        import pandas as pd

        if name not in TABLES:
            raise StoreError(f"table {name!r} is invalid, it must be one of {sorted(TABLES)}")
        cur = self.conn.execute(
            "SELECT r.data_json, r.specimen_id, i.inspection_id, i.command, i.image, i.image_sha256, "
            "i.exposure_h, i.series, i.profile_sha256, i.tool_version, i.analysed_at "
            "FROM results r JOIN inspections i ON r.inspection_id = i.inspection_id "
            "WHERE r.table_name = ? ORDER BY i.inspection_id, r.seq", (name,))
        records, meta = [], []
        for data, spec, *rest in cur.fetchall():
            records.append(json.loads(data))
            meta.append((spec, *rest))
        columns = list(TABLES[name])
        for rec in records:
            columns.extend(k for k in rec if k not in columns and k not in META_COLUMNS)
        df = pd.DataFrame.from_records(records, columns=columns) if records else pd.DataFrame(columns=columns)
        for c in df.columns:  # as a CSV reader would: empty cells of number columns are NaN
            if len(df) and df[c].dtype == object:
                vals = [v for v in df[c] if v is not None]
                if all(isinstance(v, (int, float)) and not isinstance(v, bool) for v in vals):
                    df[c] = pd.to_numeric(df[c].astype(object).where(df[c].notna(), np.nan))
        m = pd.DataFrame(meta, columns=list(META_COLUMNS)) if meta else pd.DataFrame(columns=list(META_COLUMNS))
        if len(m):
            known = [str(s) for s in self.specimens()["specimen_id"]]
            m["specimen_id"] = [s if s is not None else match_specimen(img, known)
                                for s, img in zip(m["specimen_id"], m["inspection_image"])]
        for c in META_COLUMNS:
            df[c] = m[c].to_numpy() if len(m) else pd.Series(dtype=object)
        return df


def match_specimen(image: str, specimen_ids: list[str]) -> str | None:
    """The one specimen ID found as a whole word in the image's file or folder name, else None."""
    p = Path(str(image))
    names = [p.stem, p.parent.name]
    hits = set()
    for sid in specimen_ids:
        pat = re.compile(rf"(?<![A-Za-z0-9]){re.escape(sid)}(?![A-Za-z0-9])")
        if any(pat.search(n) for n in names):
            hits.add(sid)
    return hits.pop() if len(hits) == 1 else None


def flat_row(mapping: Mapping, sep: str = "_") -> dict:
    """A nested mapping as one flat row: ``{"final": {"t_min": 40}}`` -> ``{"final_t_min": 40}``.

    For summaries such as droplet_summary.json's events, so every value is one column.
    """
    out: dict = {}
    for k, v in mapping.items():
        if isinstance(v, Mapping):
            out.update({f"{k}{sep}{kk}": vv for kk, vv in flat_row(v, sep).items()})
        else:
            out[str(k)] = v
    return out


def default_db_path(campaign_dir: str | Path) -> Path:
    return Path(campaign_dir) / DEFAULT_DB_NAME


def resolve_db_path(out_dir: str | Path, db_option: str | Path | None = None) -> Path:
    """The database a command writes to: ``--db`` if given; else an existing ``coupon.db`` in its
    ``--out`` folder or in that folder's parent (the campaign folder when ``--out`` is a subfolder,
    e.g. ``DIR/panels``); else ``<--out>/coupon.db`` (created)."""
    if db_option is not None:
        return Path(db_option)
    out_dir = Path(out_dir)
    for cand in (out_dir / DEFAULT_DB_NAME, out_dir.parent / DEFAULT_DB_NAME):
        if cand.is_file():
            return cand
    return out_dir / DEFAULT_DB_NAME


def is_recorded(db_path: str | Path, command: str, image_path: str | Path, image_sha256: str | None) -> bool:
    """True if the database already holds ``image_path`` for ``command`` with these image bytes.

    A command that skips an image on resume calls this and, when False, records the rows
    it kept from its previous CSV (so a database added later still gets every image).
    """
    if not Path(db_path).is_file():
        return False
    with open_store(db_path, create=False) as store:
        got = store.conn.execute("SELECT image_sha256 FROM inspections WHERE command = ? AND image = ?",
                                 (command, str(image_path))).fetchone()
    return got is not None and (image_sha256 is None or got[0] == image_sha256)


def open_store(db_path: str | Path, create: bool = True) -> CampaignStore:
    """Open (and with ``create``, create) a campaign database; WAL mode, foreign keys on.

    Raises
    ------
    StoreError
        The file is missing (``create=False``), not a SQLite database, or of a newer schema.
    """
    path = Path(db_path)
    if not create and not path.is_file():
        raise StoreError("no campaign database here; create one with 'coupon campaign init DIR --layout "
                         "specimens.csv' or pass --db", path)
    path.parent.mkdir(parents=True, exist_ok=True)
    try:
        conn = sqlite3.connect(str(path), timeout=BUSY_TIMEOUT_MS / 1000, isolation_level=None)
        conn.execute(f"PRAGMA busy_timeout = {BUSY_TIMEOUT_MS}")
        mode = conn.execute("PRAGMA journal_mode = WAL").fetchone()[0]
        conn.execute("PRAGMA foreign_keys = ON")
        conn.executescript(_SCHEMA)
    except sqlite3.DatabaseError as exc:
        raise StoreError(f"not a usable SQLite campaign database ({exc})", path) from None
    if str(mode).lower() != "wal":
        conn.close()
        raise StoreError(f"could not switch the database to WAL mode (got {mode!r}); is it on a network drive?",
                         path)
    store = CampaignStore(conn, path)
    version = store.meta().get("schema_version")
    if version is None:
        store.set_meta(schema_version=str(SCHEMA_VERSION), created=_now(), tool_version=__version__)
    elif int(version) != SCHEMA_VERSION:
        conn.close()
        raise StoreError(f"campaign database schema version {version} is not supported by coupon {__version__} "
                         f"(reads version {SCHEMA_VERSION})", path)
    return store


def record_results(db_path: str | Path, command: str, image_path: str | Path, image_sha256: str | None,
                   settings: Mapping, profile_sha256: str | None, tables: Mapping[str, list[Mapping]], *,
                   exposure_h: float | None = None, specimen_id: str | None = None, series: str | None = None,
                   tool_version: str | None = None, analysed_at: str | None = None) -> int:
    """Store one image's result rows, replacing that image's earlier rows for ``command``.

    The one call each command makes after each image, with the very rows it writes to
    its CSVs.  Everything happens in one transaction: on any exception (a row that
    cannot be stored, a crash) the database keeps its previous state.

    Parameters
    ----------
    db_path : path
        The campaign database (created if missing; default ``DIR/coupon.db``).
    command : {"panels", "pits", "droplet"}
    image_path : path or str
        The analysed image (the key together with ``command``); for a droplet series
        summary, the series key (e.g. its frames folder).
    image_sha256 : str or None
        SHA-256 of the image bytes (``LoadedImage.sha256``).
    settings : mapping
        The command's settings for this image (stored as JSON).
    profile_sha256 : str or None
        ``Profile.sha256`` of the calibration profile used.
    tables : mapping of table name to list of row dicts
        ``panels`` -> ``{"panels": rows}``; ``pits`` -> ``{"pits": rows, "pit_summary": [row]}``;
        ``droplet`` -> ``{"droplet": [row], "radial_profile": rows}`` per frame and
        ``{"droplet_summary": [summary]}`` per series.  An empty list stores no rows
        but still records the inspection (e.g. no panel found).
    exposure_h : float, optional
        Exposure time; default the first row's ``exposure_h``.
    specimen_id : str, optional
        The specimen of every row (pits and droplet; panels rows carry ``panel_id``).
    series : str, optional
        A droplet series name.

    Returns
    -------
    int
        The new inspection ID.

    Examples
    --------
    >>> record_results(tmp / "coupon.db", "pits", "c01.png", "ab12...", {"edge_mm": 2}, None,
    ...                {"pits": pit_rows, "pit_summary": [summary_row]}, specimen_id="C01")  # doctest: +SKIP
    """
    with open_store(db_path) as store:
        return store.replace_results(command, image_path, image_sha256, settings, profile_sha256, tables,
                                     exposure_h=exposure_h, specimen_id=specimen_id, series=series,
                                     tool_version=tool_version, analysed_at=analysed_at)


def read_table(db_path: str | Path, name: str):
    """:meth:`CampaignStore.table` of an existing database."""
    with open_store(db_path, create=False) as store:
        return store.table(name)


def read_specimens(db_path: str | Path):
    with open_store(db_path, create=False) as store:
        return store.specimens()


def read_inspections(db_path: str | Path):
    with open_store(db_path, create=False) as store:
        return store.inspections()
