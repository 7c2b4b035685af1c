"""Kill anywhere, resume to the same result.

`scanshelf migrate` and `scanshelf publish` run in their own processes and are killed with
SIGKILL at named crash points in the write path (archive.crashpoints) and after random delays; the
same command is then run again and the shelf must equal a clean run's: the same files, the
same decoded points per scan, the same catalog apart from the ``published`` timestamps, no
temporary files, no scan twice and a ledger that agrees with the files.
"""

from __future__ import annotations

import json
import os
import random
import signal
import sqlite3
import subprocess
import sys
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path

import pyarrow.parquet as pq
import pytest

from tests import factory, killing
from tests.killing import write_source

CRS = factory.SITE_CRS
SEED = 20261202


def migrate_args(source: Path, shelf: Path, previews: bool = False) -> list[str]:
    return ["migrate", str(source), str(shelf), "--crs", CRS, "-q"] + ([] if previews else ["--no-previews"])


def check_consistent(shelf: Path) -> None:
    """No temp files, one points file per ledger scan, no scan twice anywhere."""
    assert killing.temp_files(shelf) == []
    db = sqlite3.connect(f"file:{shelf / 'ledger.sqlite'}?mode=ro&immutable=1", uri=True)
    try:
        scans = [r[0] for r in db.execute("SELECT scan_id FROM scans")]
        done = db.execute("SELECT scan_id, outputs FROM files WHERE status IN ('done', 'partial')").fetchall()
    finally:
        db.close()
    assert len(scans) == len(set(scans))
    assert sorted(s for s, _ in done) == sorted(scans)
    for _, outputs in done:
        for rel in json.loads(outputs):
            assert (shelf / rel).exists(), rel
    points = sorted(p.stem for p in (shelf / "points").rglob("*.parquet"))
    assert points == sorted(scans)
    index = pq.read_table(shelf / "scans/items.parquet").column("id").to_pylist()
    assert sorted(index) == sorted(scans)
    for station in {s.split("-")[0] for s in scans}:
        from archive.grids import open_cube

        ids = [str(v) for v in open_cube(str(shelf / f"grids/{station}.zarr"))["scan_id"].values]
        assert sorted(ids) == sorted(s for s in scans if s.startswith(station + "-"))


@pytest.fixture(scope="module")
def work(tmp_path_factory):
    base = tmp_path_factory.mktemp("kill")
    source = base / "source"
    write_source(source)
    ref = base / "reference"
    log = base / "crash.log"
    clean = killing.run(migrate_args(source, ref), crash_log=str(log), log_dir=base / "logs")
    assert clean.exitcode == 0, clean.output
    check_consistent(ref)
    counts = killing.crash_counts(log)
    # every named point of the write path is reached in a clean run
    assert {"survey.written", "points.row_group", "points.written", "points.renamed", "grid.shard", "grid.epoch",
            "ledger.committed", "catalog.file", "zarr.object", "report.written"} <= set(counts), counts
    return base, source, ref, killing.shelf_state(ref), counts, clean.seconds


def _spread(count: int, k: int) -> list[int]:
    """k occurrences spread over 1..count, first and last included."""
    if count <= k:
        return list(range(1, count + 1))
    if k == 1:
        return [count]
    return sorted({1 + round(i * (count - 1) / (k - 1)) for i in range(k)})


def kill_plan(counts) -> list[str]:
    picks = {"survey.written": 1, "points.row_group": 1, "points.written": 2, "points.renamed": 2,
             "grid.shard": 2, "grid.epoch": 2, "ledger.committed": 2, "catalog.file": 3, "zarr.object": 4,
             "report.written": 1}
    return [f"{name}:{n}" for name, k in picks.items() for n in _spread(counts[name], k)]


def _cycle(base: Path, source: Path, name: str, kills: list[dict]) -> tuple[str, list, list]:
    """Run the command once per kill (each killed), then once to the end; return the shelf's state."""
    shelf = base / "cycles" / name.replace(":", "_").replace(".", "_")
    outcomes = []
    for kill in kills:
        r = killing.run(migrate_args(source, shelf), log_dir=base / "logs", **kill)
        outcomes.append(r.exitcode)
    final = killing.run(migrate_args(source, shelf), log_dir=base / "logs")
    assert final.exitcode == 0, f"{name}: re-run failed:\n{final.output}"
    check_consistent(shelf)
    return name, outcomes, killing.shelf_state(shelf)


def test_migrate_killed_at_crash_points_resumes_to_the_clean_shelf(work) -> None:
    base, source, _, want, counts, _ = work
    plan = kill_plan(counts)
    assert len(plan) >= 16, plan
    with ThreadPoolExecutor(max_workers=2) as pool:
        results = list(pool.map(lambda at: _cycle(base, source, at, [{"crash_at": at}]), plan))
    survived = 0
    for name, outcomes, state in results:
        assert outcomes == [-signal.SIGKILL], f"{name}: the run was not killed there: {outcomes}"
        assert killing.differences(state, want) == [], name
        survived += 1
    print(f"\nFIGURE kill points survived (migrate, injected): {survived} of {len(plan)}")


def test_migrate_killed_after_random_delays_and_while_recovering(work) -> None:
    base, source, _, want, _, seconds = work
    rng = random.Random(SEED)
    cycles = {f"delay-{i}": [{"kill_after": rng.uniform(0.5, max(1.0, seconds))}] for i in range(3)}
    # a kill during the recovery of an earlier kill
    cycles["twice-a"] = [{"crash_at": "grid.epoch:2"}, {"crash_at": "catalog.file:3"}]
    cycles["twice-b"] = [{"crash_at": "points.written:3"}, {"crash_at": "zarr.object:2"}]
    with ThreadPoolExecutor(max_workers=2) as pool:
        results = list(pool.map(lambda kv: _cycle(base, source, kv[0], kv[1]), cycles.items()))
    killed = 0
    for name, outcomes, state in results:
        assert killing.differences(state, want) == [], name
        killed += sum(1 for c in outcomes if c == -signal.SIGKILL)
    assert killed >= 4  # the injected double kills always fire; a delay may outlast a fast run
    print(f"\nFIGURE kill points survived (migrate, random delays and kills during recovery): {killed}")


def test_incremental_migration_killed_before_its_catalog_update(tmp_path) -> None:
    """A second migration of new files, killed after its scans are in the ledger: the re-run
    must still bring the catalog up to date."""
    source = tmp_path / "source"
    write_source(source, "first")
    ref, shelf = tmp_path / "ref", tmp_path / "shelf"
    logs = tmp_path / "logs"
    for target in (ref, shelf):
        assert killing.run(migrate_args(source, target), log_dir=logs).exitcode == 0
    write_source(source, "second")
    assert killing.run(migrate_args(source, ref), log_dir=logs).exitcode == 0
    killed = killing.run(migrate_args(source, shelf), crash_at="ledger.committed:2", log_dir=logs)
    assert killed.exitcode == -signal.SIGKILL
    again = killing.run(migrate_args(source, shelf), log_dir=logs)
    assert again.exitcode == 0, again.output
    check_consistent(shelf)
    assert killing.differences(killing.shelf_state(shelf), killing.shelf_state(ref)) == []


def test_previews_survive_a_kill(tmp_path) -> None:
    source = tmp_path / "source"
    write_source(source, "first")
    ref, shelf, logs = tmp_path / "ref", tmp_path / "shelf", tmp_path / "logs"
    assert killing.run(migrate_args(source, ref, previews=True), log_dir=logs).exitcode == 0
    killed = killing.run(migrate_args(source, shelf, previews=True), crash_at="preview.renamed:1", log_dir=logs)
    assert killed.exitcode == -signal.SIGKILL
    assert killing.run(migrate_args(source, shelf, previews=True), log_dir=logs).exitcode == 0
    check_consistent(shelf)
    assert killing.differences(killing.shelf_state(shelf), killing.shelf_state(ref)) == []


def test_the_real_command_line_killed_and_rerun(work, tmp_path) -> None:
    """The installed `scanshelf` script itself, in a plain subprocess, killed mid-run."""
    _, source, _, want, _, _ = work
    exe = Path(sys.executable).with_name("scanshelf")
    assert exe.exists(), f"{exe} missing: pip install -e . first"
    shelf = tmp_path / "shelf"
    env = {**os.environ, "SCANSHELF_CRASH_AT": "points.renamed:2", "MPLBACKEND": "Agg"}
    killed = subprocess.run([str(exe), *migrate_args(source, shelf)], env=env, capture_output=True, timeout=300, check=False)
    assert killed.returncode == -signal.SIGKILL, killed.stderr.decode()
    env.pop("SCANSHELF_CRASH_AT")
    again = subprocess.run([str(exe), *migrate_args(source, shelf)], env=env, capture_output=True, timeout=300, check=False)
    assert again.returncode == 0, again.stderr.decode()
    check_consistent(shelf)
    assert killing.differences(killing.shelf_state(shelf), want) == []


# --- publish ------------------------------------------------------------------------------------

def _dest_state(root: Path) -> dict[str, str]:
    return {k: v for k, v in killing.shelf_state(root).items()}


def test_publish_killed_anywhere_resumes_to_the_clean_copy(work) -> None:
    base, _, ref, _, _, _ = work
    clean = base / "published" / "clean"
    log = base / "publish-crash.log"
    first = killing.run(["publish", str(ref), str(clean), "-q", "--workers", "2"], crash_log=str(log),
                        log_dir=base / "logs")
    assert first.exitcode == 0, first.output
    expected = _dest_state(clean)
    assert "catalog.json" in expected and "manifest.parquet" in expected
    points = killing.crash_counts(log)
    assert {"publish.temp", "publish.file", "publish.phase", "publish.manifest"} <= set(points), points
    plan = [f"{name}:{n}" for name, k in (("publish.temp", 3), ("publish.file", 4), ("publish.phase", 3),
                                          ("publish.manifest", 1)) for n in _spread(points[name], k)]
    rng = random.Random(SEED)
    kills = [{"crash_at": at} for at in plan] + [{"kill_after": rng.uniform(0.3, max(0.6, first.seconds))}
                                                 for _ in range(2)]

    def cycle(i_kill):
        i, kill = i_kill
        dest = base / "published" / f"cycle-{i}"
        r = killing.run(["publish", str(ref), str(dest), "-q", "--workers", "2"], log_dir=base / "logs", **kill)
        again = killing.run(["publish", str(ref), str(dest), "-q", "--workers", "2"], log_dir=base / "logs")
        assert again.exitcode == 0, again.output
        return kill, r.exitcode, _dest_state(dest), killing.temp_files(dest)

    with ThreadPoolExecutor(max_workers=2) as pool:
        results = list(pool.map(cycle, enumerate(kills)))
    survived = 0
    for kill, code, state, temps in results:
        assert temps == [], kill
        assert killing.differences(state, expected) == [], kill
        if "crash_at" in kill:
            assert code == -signal.SIGKILL, kill
        survived += code == -signal.SIGKILL
    assert survived >= len(plan)
    print(f"\nFIGURE kill points survived (publish): {survived} of {len(kills)} runs killed")
