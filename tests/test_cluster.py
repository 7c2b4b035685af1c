"""Migration on a dask LocalCluster: same shelf as the serial run, and survives a killed worker."""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import psutil
import pyarrow.parquet as pq

from archive.cluster import DaskExecutor
from archive.ledger import Ledger
from archive.migrate import migrate
from tests import factory


def _content(shelf: Path) -> dict[str, tuple]:
    """Per scan: point count, and the Parquet file's checksum (the writer is deterministic)."""
    with Ledger(shelf / "ledger.sqlite") as ledger:
        return {r.scan_id: (r.point_count, r.points_sha256, r.bbox, r.columns) for r in ledger.scans()}


def _items(shelf: Path) -> dict[str, dict]:
    import json

    out = {}
    for p in (shelf / "scans/items").rglob("*.json"):
        item = json.loads(p.read_text())
        for key in ("created", "updated", "published"):  # times of writing, not of content
            item["properties"].pop(key, None)
        out[item["id"]] = item
    return out


def test_two_workers_give_the_serial_shelf(small_source, small_shelf, tmp_path):
    root, _ = small_source
    serial, _, _ = small_shelf
    result = migrate(str(root), str(tmp_path / "shelf"), crs=factory.SITE_CRS, workers=2)
    assert result.dashboard and result.dashboard.startswith("http://127.0.0.1:")
    assert _content(tmp_path / "shelf") == _content(serial)
    assert _items(tmp_path / "shelf") == _items(serial)
    for p in (serial / "points").rglob("*.parquet"):
        other = tmp_path / "shelf" / p.relative_to(serial)
        assert pq.read_table(other).equals(pq.read_table(p))


def test_workers_keep_the_adaptive_allocator(monkeypatch):
    """distributed's own default config (distributed.yaml, nanny.pre-spawn-environ) starts every
    worker with MALLOC_TRIM_THRESHOLD_=65536, which turns off glibc's adaptive mmap threshold
    (mallopt(3): setting the variable fixes the threshold); our local workers must start without it."""
    import dask
    import distributed  # noqa: F401 - loads its default config

    monkeypatch.delenv("MALLOC_TRIM_THRESHOLD_", raising=False)
    assert dask.config.get("distributed.nanny.pre-spawn-environ")["MALLOC_TRIM_THRESHOLD_"] == 65536
    executor = DaskExecutor(workers=1)
    try:
        seen = dict(executor.run(os.getenv, ["MALLOC_TRIM_THRESHOLD_", "OMP_NUM_THREADS"]))
    finally:
        executor.close()
    assert seen == {"MALLOC_TRIM_THRESHOLD_": None, "OMP_NUM_THREADS": "1"}  # the nanny's other settings stay


KILLABLE = """
import sys
from archive.migrate import migrate
r = migrate(sys.argv[1], sys.argv[2], workers=2, previews=False)
print("converted", len(r.converted), "failed", len(r.failed))
"""


def test_killed_worker_still_leaves_a_complete_shelf(tmp_path):
    source = tmp_path / "source"
    for i in range(6):
        factory.write_las(source / f"north/scan_{i}.las", 400_000, factory.utc(2026, 9, 1, i), seed=i, extra=False)
    shelf = tmp_path / "shelf"
    proc = subprocess.Popen([sys.executable, "-c", KILLABLE, str(source), str(shelf)],
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    killed = None
    deadline = time.monotonic() + 240
    while killed is None and time.monotonic() < deadline and proc.poll() is None:
        if list((shelf / "points").rglob("*.part-*")):  # a worker is writing a scan right now
            workers = [c for c in psutil.Process(proc.pid).children(recursive=True)
                       if "dask" in " ".join(c.cmdline()) or "spawn_main" in " ".join(c.cmdline())]
            if workers:
                killed = workers[-1].pid
                os.kill(killed, signal.SIGKILL)
        time.sleep(0.05)
    out, err = proc.communicate(timeout=300)
    assert killed is not None, "no worker was caught mid-write; the test could not kill one"
    assert proc.returncode == 0, err[-2000:]
    assert "converted 6 failed 0" in out
    content = _content(shelf)
    assert sorted(content) == [f"north-20260901T0{i}0000Z" for i in range(6)]
    assert all(v[0] == 400_000 for v in content.values())
    assert not list(shelf.rglob("*.part-*")) and not list(shelf.rglob(".scanshelf-spill-*"))
    for p in (shelf / "points").rglob("*.parquet"):
        assert pq.ParquetFile(p).metadata.num_rows == 400_000
