"""Run ``scanshelf`` commands in separate processes, SIGKILL them, and compare shelves.

Importing scanshelf's dependencies takes seconds; a tiny migration takes less. So commands run
in processes forked from a multiprocessing *forkserver* that imported everything once: each run
is still its own process with its own memory, killed by SIGKILL from outside (random delays) or
by itself at a named crash point (``archive.crashpoints``), with no chance to clean up.

Besides the crash points in the library, the child adds two kinds by wrapping, for this harness
only: ``catalog.file`` before every catalog file is written, and ``zarr.object`` after every
object zarr writes into a local cube.
"""

from __future__ import annotations

import hashlib
import json
import multiprocessing as mp
import os
import re
import sqlite3
import time
from collections import Counter
from dataclasses import dataclass
from pathlib import Path

import pyarrow as pa
import pyarrow.parquet as pq

from archive import crashpoints
from tests import factory

PRELOAD = [  # package __init__s import on first use (archive/lazy.py): name the modules themselves
    "archive.cli", "archive.migrate", "archive.publish", "archive.catalog.build", "archive.grids.cube",
    "archive.report.previews", "archive.report.html", "archive.crashpoints", "tests.killing", "laspy", "zarr",
    "xarray", "matplotlib.pyplot",
]
EXIT_MARK = "EXIT_CODE"
TEMP_MARKS = (".part-", ".part", ".partial", ".tmp-", ".scanshelf-spill-", ".publishing")
_ctx = None


def context():
    global _ctx
    if _ctx is None:
        os.environ.setdefault("MPLBACKEND", "Agg")
        _ctx = mp.get_context("forkserver")
        _ctx.set_forkserver_preload(PRELOAD)
    return _ctx


def _child(argv: list[str], crash_at: str | None, crash_log: str | None, out: str, env: dict) -> None:
    fd = os.open(out, os.O_WRONLY | os.O_CREAT | os.O_APPEND, 0o644)
    os.dup2(fd, 1)
    os.dup2(fd, 2)
    os.environ.update(env)
    from archive import crashpoints

    crashpoints.configure(crash_at, crash_log)
    _wrap_writes()
    from archive.cli import cli
    from archive.cli.common import fail_cleanly

    code = 0
    try:
        with fail_cleanly():
            cli.main(args=argv, prog_name="scanshelf", standalone_mode=True)
    except SystemExit as exc:
        code = exc.code if isinstance(exc.code, int) else 1
    except BaseException:  # noqa: BLE001 (an unexpected traceback is a finding: show it, exit non-zero)
        import traceback

        traceback.print_exc()
        code = 3
    import resource
    import sys

    print(f"MAXRSS_KB {resource.getrusage(resource.RUSAGE_SELF).ru_maxrss}")
    print(f"{EXIT_MARK} {code}")
    sys.stdout.flush()
    sys.stderr.flush()
    os._exit(code)


def _wrap_writes() -> None:
    from zarr.storage import LocalStore

    from archive.catalog import store
    from archive.crashpoints import crash_point

    write_bytes = store.ShelfFiles.write_bytes

    def catalog_write(self, rel, data):
        crash_point("catalog.file")
        return write_bytes(self, rel, data)

    store.ShelfFiles.write_bytes = catalog_write
    zarr_set = LocalStore.set

    async def zarr_write(self, key, value):
        await zarr_set(self, key, value)
        crash_point("zarr.object")

    LocalStore.set = zarr_write


@dataclass
class Run:
    exitcode: int
    killed: bool
    output: str
    seconds: float

    @property
    def peak_mib(self) -> float | None:
        """Peak resident memory of the run (includes the pre-imported libraries)."""
        for line in self.output.splitlines():
            if line.startswith("MAXRSS_KB "):
                return int(line.split()[1]) / 1024
        return None


def run(argv: list[str], *, crash_at: str | None = None, crash_log: str | None = None,
        kill_after: float | None = None, env: dict | None = None, log_dir: Path) -> Run:
    """One command in a fresh forked process; SIGKILL it after ``kill_after`` seconds if still running."""
    log_dir.mkdir(parents=True, exist_ok=True)
    out = log_dir / f"run-{time.monotonic_ns()}.log"
    start = time.perf_counter()
    p = context().Process(target=_child, args=(argv, crash_at, crash_log, str(out), env or {}))
    p.start()
    p.join(kill_after)
    we_killed = p.is_alive()
    if we_killed:
        p.kill()
        p.join()
    text = out.read_text(errors="replace") if out.exists() else ""
    code = _exit_code(p.exitcode, we_killed, text)
    return Run(code, code == -9, text, time.perf_counter() - start)


def _exit_code(reported: int, we_killed: bool, text: str) -> int:
    """The child's real exit status.

    Under load the forkserver can lose a child's status and report 255 instead (CPython
    issue gh-140867); the child's own last line (its exit code, or the crash point's mark)
    then says what happened.
    """
    if reported != 255:
        return reported
    if we_killed or crashpoints.KILLED_MARK in text:
        return -9
    codes = re.findall(rf"^{EXIT_MARK} (-?\d+)$", text, flags=re.M)
    return int(codes[-1]) if codes else reported


def crash_counts(log: Path) -> Counter:
    return Counter(log.read_text().split()) if log.exists() else Counter()


def write_source(root: Path, which: str = "all") -> None:
    """Four small scans over two stations in three formats (a few thousand points each)."""
    if which in ("all", "first"):
        factory.write_las(root / "north/a.las", 3000, factory.utc(2026, 9, 1, 6), seed=1)
        factory.write_las(root / "south/S_20260901_180000.las", 3000, factory.utc(2026, 9, 1, 18),
                          version="1.2", point_format=1, seed=3, extra=False)
    if which in ("all", "second"):
        factory.write_las(root / "north/b.laz", 3000, factory.utc(2026, 9, 1, 12), seed=2, point_format=7)
        factory.write_csv(root / "south/exp 20260902T060000.csv", 2000, seed=4)


# --- comparing shelves ------------------------------------------------------------------------

def temp_files(root: Path) -> list[str]:
    return sorted(str(p.relative_to(root)) for p in root.rglob("*") if any(m in p.name for m in TEMP_MARKS))


def _strip_published(item: dict) -> dict:
    item = json.loads(json.dumps(item))
    item.get("properties", {}).pop("published", None)
    return item


def _index_rows(path: Path) -> list:
    table = pq.read_table(path)
    rows = []
    for row in table.to_pylist():
        row.pop("published", None)
        row["item_json"] = _strip_published(json.loads(row["item_json"]))
        rows.append(json.dumps(row, sort_keys=True, default=str))
    return rows


def _points(path: Path) -> str:
    """The decoded table (values, types, key-value metadata), hashed."""
    table = pq.read_table(path)
    sink = pa.BufferOutputStream()
    with pa.ipc.new_stream(sink, table.schema) as writer:
        writer.write_table(table)
    return hashlib.sha256(sink.getvalue().to_pybytes()).hexdigest()


def _ledger(path: Path) -> dict:
    db = sqlite3.connect(f"file:{path}?mode=ro&immutable=1", uri=True)
    try:
        files = db.execute(
            "SELECT relpath, size, sha256, kind, status, station, scan_id, outputs, error FROM files ORDER BY relpath"
        ).fetchall()
        scans = db.execute("SELECT scan_id, station, status, record, source_relpath, source_sha256 FROM scans ORDER BY scan_id").fetchall()
        history = db.execute("SELECT relpath, sha256, scan_id FROM history ORDER BY relpath, scan_id").fetchall()
        settings = db.execute("SELECT key, value FROM settings ORDER BY key").fetchall()
        inspections = db.execute("SELECT relpath, size, report FROM inspections ORDER BY relpath").fetchall()
    finally:
        db.close()
    return {"files": files, "scans": scans, "history": history, "settings": settings, "inspections": inspections}


def shelf_state(root: Path) -> dict[str, object]:
    """Everything a shelf holds, with the one run-dependent value removed.

    Timestamps, found by diffing two clean runs of the same source: the Items' ``published``
    (and its copy in the items index, hence the index's checksum on the scans Collection's link to
    it), the ledger's ``updated``/``replaced`` columns, and the
    "made <time>" line of the health page ``index.html`` (which also names the shelf's folder) and
    the keys of its map blocks (they hash the cube objects' modification times).
    Everything else is byte-identical between clean runs.
    """
    state: dict[str, object] = {}
    for p in sorted(root.rglob("*")):
        if not p.is_file():
            continue
        rel = str(p.relative_to(root))
        if rel == "ledger.sqlite":
            state[rel] = _ledger(p)
        elif rel.startswith("ledger.sqlite-"):
            state[rel] = "sqlite side file"  # -wal / -shm: must not outlive the run
        elif rel == "scans/items.parquet":
            state[rel] = _index_rows(p)
        elif rel.startswith("scans/items/"):
            state[rel] = _strip_published(json.loads(p.read_text()))
        elif rel == "scans/collection.json":  # its link to the index carries the index's checksum
            doc = json.loads(p.read_text())
            for link in doc["links"]:
                link.pop("file:checksum", None)
                link.pop("file:size", None)
            state[rel] = doc
        elif rel == "index.html":  # the health page names the shelf's folder and the time it was made
            page = p.read_bytes().replace(str(root).encode(), b"<shelf>")
            page = re.sub(rb"made \d{4}-\d\d-\d\d \d\d:\d\d UTC", b"made <time>", page)
            page = re.sub(rb"<!-- scanshelf-maps [0-9a-f]{64} -->", b"<!-- scanshelf-maps <key> -->", page)
            state[rel] = hashlib.sha256(page).hexdigest()
        elif rel.startswith("points/") and rel.endswith(".parquet"):
            state[rel] = ("decoded", _points(p), "bytes", hashlib.sha256(p.read_bytes()).hexdigest())
        else:
            state[rel] = hashlib.sha256(p.read_bytes()).hexdigest()
    return state


def differences(got: dict, want: dict) -> list[str]:
    out = [f"missing: {k}" for k in sorted(set(want) - set(got))]
    out += [f"extra: {k}" for k in sorted(set(got) - set(want))]
    out += [f"differs: {k}" for k in sorted(set(got) & set(want)) if got[k] != want[k]]
    return out
