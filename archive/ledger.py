"""The ledger: the migration's transactional record of every source file and every scan.

SQLite in the shelf (``ledger.sqlite``). Only the process that coordinates a migration writes
it, one transaction per finished file, after the file's outputs were renamed into place — so
a killed run leaves either a finished entry or none, never half of one.
"""

from __future__ import annotations

import json
import sqlite3
from dataclasses import dataclass
from datetime import datetime, timezone
from pathlib import Path
from typing import Any, Iterable, Iterator

from archive.records import ScanRecord

SCHEMA = """
CREATE TABLE IF NOT EXISTS files (
    relpath TEXT PRIMARY KEY,
    size INTEGER,
    mtime REAL,
    sha256 TEXT,
    kind TEXT,
    status TEXT,          -- done | partial | duplicate | failed | ignored
    station TEXT,
    scan_id TEXT,
    outputs TEXT,         -- JSON list of shelf-relative paths
    error TEXT,
    updated TEXT
);
CREATE TABLE IF NOT EXISTS scans (
    scan_id TEXT PRIMARY KEY,
    station TEXT,
    status TEXT,          -- done
    record TEXT,          -- ScanRecord JSON
    source_relpath TEXT,
    source_sha256 TEXT,
    updated TEXT
);
CREATE TABLE IF NOT EXISTS history (
    relpath TEXT,
    sha256 TEXT,
    scan_id TEXT,
    replaced TEXT
);
CREATE TABLE IF NOT EXISTS inspections (
    relpath TEXT PRIMARY KEY,
    size INTEGER,
    mtime REAL,
    report TEXT           -- FileReport JSON: a re-run does not read unchanged files again
);
CREATE TABLE IF NOT EXISTS settings (
    key TEXT PRIMARY KEY,
    value TEXT
);
CREATE TABLE IF NOT EXISTS object_hashes (
    store TEXT,           -- shelf-relative path of a directory store (a Zarr cube)
    path TEXT,            -- object path inside it
    size INTEGER,
    mtime REAL,
    sha256 TEXT,          -- a cache only: the catalog's checksum of a store costs the new objects
    PRIMARY KEY (store, path)
);
"""


def _now() -> str:
    return datetime.now(timezone.utc).isoformat(timespec="seconds")


@dataclass(frozen=True)
class FileEntry:
    relpath: str
    size: int
    sha256: str
    kind: str
    status: str
    station: str | None
    scan_id: str | None
    outputs: tuple[str, ...]
    error: str | None


class Ledger:
    """A thin, typed layer over the SQLite file."""

    def __init__(self, path: str | Path) -> None:
        self.path = Path(path)
        self.path.parent.mkdir(parents=True, exist_ok=True)
        self._db = sqlite3.connect(self.path, timeout=60, isolation_level=None)
        self._db.execute("PRAGMA journal_mode=WAL")
        self._db.execute("PRAGMA synchronous=FULL")
        self._db.executescript(SCHEMA)

    def close(self) -> None:
        """Fold the write-ahead log back into the file, so no -wal/-shm files stay in the shelf."""
        try:
            self._db.execute("PRAGMA wal_checkpoint(TRUNCATE)")
            self._db.execute("PRAGMA journal_mode=DELETE")
        except sqlite3.OperationalError:  # another connection still reads: it leaves the log to the last one
            pass
        self._db.close()

    def __enter__(self) -> "Ledger":
        return self

    def __exit__(self, *exc: Any) -> None:
        self.close()

    # settings -------------------------------------------------------------------------------
    def setting(self, key: str) -> Any | None:
        row = self._db.execute("SELECT value FROM settings WHERE key = ?", (key,)).fetchone()
        return json.loads(row[0]) if row else None

    def set_setting(self, key: str, value: Any) -> None:
        self._db.execute("INSERT OR REPLACE INTO settings VALUES (?, ?)", (key, json.dumps(value)))

    # inspections ----------------------------------------------------------------------------
    def inspection(self, relpath: str, size: int, mtime: float | None) -> str | None:
        row = self._db.execute("SELECT size, mtime, report FROM inspections WHERE relpath = ?", (relpath,)).fetchone()
        if row and row[0] == size and mtime is not None and row[1] == mtime:
            return row[2]
        return None

    def save_inspection(self, relpath: str, size: int, mtime: float | None, report: str) -> None:
        self._db.execute("INSERT OR REPLACE INTO inspections VALUES (?, ?, ?, ?)", (relpath, size, mtime, report))

    # object hashes (see archive.catalog.grids.store_fingerprint) ----------------------------
    def object_hashes(self, store: str) -> dict[str, tuple[int, float, str]]:
        rows = self._db.execute("SELECT path, size, mtime, sha256 FROM object_hashes WHERE store = ?", (store,))
        return {path: (size, mtime, sha) for path, size, mtime, sha in rows}

    def keep_object_hashes(self, store: str, hashes: dict[str, tuple[int, float, str]]) -> None:
        """Replace the store's cached hashes with ``hashes`` (objects gone from the store drop out)."""
        with self.transaction():
            self._db.execute("DELETE FROM object_hashes WHERE store = ?", (store,))
            self._db.executemany("INSERT INTO object_hashes VALUES (?, ?, ?, ?, ?)",
                                 [(store, p, *v) for p, v in hashes.items()])

    # files and scans ------------------------------------------------------------------------
    def file(self, relpath: str) -> FileEntry | None:
        row = self._db.execute(
            "SELECT relpath, size, sha256, kind, status, station, scan_id, outputs, error FROM files WHERE relpath = ?",
            (relpath,),
        ).fetchone()
        if row is None:
            return None
        return FileEntry(*row[:7], tuple(json.loads(row[7] or "[]")), row[8])

    def files(self) -> list[FileEntry]:
        rows = self._db.execute(
            "SELECT relpath, size, sha256, kind, status, station, scan_id, outputs, error FROM files ORDER BY relpath"
        ).fetchall()
        return [FileEntry(*r[:7], tuple(json.loads(r[7] or "[]")), r[8]) for r in rows]

    def record_file(
        self,
        relpath: str,
        *,
        size: int,
        mtime: float | None,
        sha256: str,
        kind: str,
        status: str,
        station: str | None = None,
        scan_id: str | None = None,
        outputs: tuple[str, ...] = (),
        error: str | None = None,
        scan: ScanRecord | None = None,
    ) -> None:
        """One file's outcome, and its scan when it produced one, in one transaction."""
        with self.transaction():
            old = self.file(relpath)
            if old is not None and old.sha256 and old.sha256 != sha256 and old.scan_id:
                self._db.execute("INSERT INTO history VALUES (?, ?, ?, ?)", (relpath, old.sha256, old.scan_id, _now()))
            self._db.execute(
                "INSERT OR REPLACE INTO files VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?)",
                (relpath, size, mtime, sha256, kind, status, station, scan_id, json.dumps(list(outputs)), error, _now()),
            )
            if scan is not None:
                self._db.execute(
                    "INSERT OR REPLACE INTO scans VALUES (?, ?, 'done', ?, ?, ?, ?)",
                    (scan.scan_id, scan.station, scan.to_json(), relpath, sha256, _now()),
                )

    def forget_scan(self, scan_id: str) -> None:
        self._db.execute("DELETE FROM scans WHERE scan_id = ?", (scan_id,))

    def scans(self, ids: Iterable[str] | None = None) -> list[ScanRecord]:
        """Finished scans (those of ``ids`` only, if given), in scan id order."""
        if ids is None:
            rows = self._db.execute("SELECT record FROM scans WHERE status = 'done' ORDER BY scan_id")
        else:  # only the wanted records leave SQLite (an update of a big shelf wants a few)
            rows = self._db.execute(
                "SELECT record FROM scans WHERE status = 'done' AND scan_id IN (SELECT value FROM json_each(?)) "
                "ORDER BY scan_id", (json.dumps(sorted(ids)),))
        return [ScanRecord.from_json(r) for (r,) in rows.fetchall()]

    def scan_checksums(self) -> dict[str, str]:
        """Scan id → SHA-256 of its points file, for every finished scan, without parsing records."""
        rows = self._db.execute(
            "SELECT scan_id, json_extract(record, '$.points_sha256') FROM scans WHERE status = 'done' ORDER BY scan_id"
        )
        return dict(rows.fetchall())

    def history(self) -> list[tuple[str, str, str, str]]:
        return self._db.execute("SELECT relpath, sha256, scan_id, replaced FROM history ORDER BY replaced").fetchall()

    def transaction(self) -> "_Transaction":
        return _Transaction(self._db)


class _Transaction:
    def __init__(self, db: sqlite3.Connection) -> None:
        self._db = db

    def __enter__(self) -> None:
        self._db.execute("BEGIN IMMEDIATE")

    def __exit__(self, exc_type, *rest: Any) -> None:
        self._db.execute("ROLLBACK" if exc_type else "COMMIT")


def iter_scan_records(path: str | Path) -> Iterator[ScanRecord]:
    """Read-only access for tools that only look (catalog rebuild, report)."""
    db = sqlite3.connect(f"file:{path}?mode=ro", uri=True)
    try:
        for (text,) in db.execute("SELECT record FROM scans WHERE status = 'done' ORDER BY scan_id"):
            yield ScanRecord.from_json(text)
    finally:
        db.close()
