"""A living archive: new and changed source files update the shelf without rewriting the rest."""

from __future__ import annotations

import os
import shutil
import sqlite3
from pathlib import Path

import xarray as xr

from archive.migrate import migrate
from tests import factory


def _mtimes(shelf: Path) -> dict[str, int]:
    return {str(p.relative_to(shelf)): p.stat().st_mtime_ns for p in shelf.rglob("*") if p.is_file()}


def test_new_scan_rewrites_only_what_it_must(small_source, tmp_path):
    root, _ = small_source
    source = tmp_path / "source"
    shutil.copytree(root, source)
    shelf = tmp_path / "shelf"
    migrate(str(source), str(shelf), crs=factory.SITE_CRS)
    before = _mtimes(shelf)

    factory.write_las(source / "north/2026/09/scan_c.las", 20_000, factory.utc(2026, 9, 5, 6), seed=11)
    result = migrate(str(source), str(shelf), crs=factory.SITE_CRS)
    assert result.converted == ["north-20260905T060000Z"]
    after = _mtimes(shelf)
    rewritten = {p for p in after if before.get(p) != after[p]}
    data = {p for p in rewritten if p.startswith(("points/", "previews/", "scans/items/"))}
    assert data == {
        "points/station=north/year=2026/north-20260905T060000Z.parquet",
        "previews/north-20260905T060000Z.png",
        "scans/items/north/north-20260905T060000Z.json",
    }
    # earlier epochs' chunks of the cube are untouched; only the new step and small coordinate arrays change
    cube_data = {p for p in rewritten if p.startswith("grids/north.zarr/elevation/c/")}
    old_chunks = {p for p in before if p.startswith("grids/north.zarr/elevation/c/")}
    assert cube_data and not (cube_data & old_chunks)
    south = {p for p in rewritten if "south" in p}
    assert south == set()
    cube = xr.open_zarr(shelf / "grids/north.zarr", zarr_format=3)
    assert sorted(cube["scan_id"].values.tolist()).count("north-20260905T060000Z") == 1


def test_changed_source_replaces_its_scan(small_source, tmp_path):
    root, _ = small_source
    source = tmp_path / "source"
    shutil.copytree(root, source)
    (source / "north/copy of scan_a.las").unlink()  # else the copy would carry the old content on
    shelf = tmp_path / "shelf"
    migrate(str(source), str(shelf), crs=factory.SITE_CRS, previews=False)
    old = sqlite3.connect(shelf / "ledger.sqlite").execute(
        "SELECT sha256 FROM files WHERE relpath='north/2026/09/scan_a.las'").fetchone()[0]

    # the same file re-exported with a corrected time and different points
    factory.write_las(source / "north/2026/09/scan_a.las", 15_000, factory.utc(2026, 9, 1, 6, 30), seed=12)
    result = migrate(str(source), str(shelf), crs=factory.SITE_CRS, previews=False)
    assert result.converted == ["north-20260901T063000Z"]
    assert result.retired == ["north-20260901T060000Z"]
    assert not list(shelf.rglob("north-20260901T060000Z*"))
    db = sqlite3.connect(shelf / "ledger.sqlite")
    assert db.execute("SELECT relpath, sha256, scan_id FROM history").fetchall() == [
        ("north/2026/09/scan_a.las", old, "north-20260901T060000Z")]
    ids = [r[0] for r in db.execute("SELECT scan_id FROM scans ORDER BY scan_id")]
    assert "north-20260901T060000Z" not in ids and "north-20260901T063000Z" in ids
    cube = xr.open_zarr(shelf / "grids/north.zarr", zarr_format=3)
    live = [s for s in cube["scan_id"].values.tolist() if s]
    assert "north-20260901T060000Z" not in live and live.count("north-20260901T063000Z") == 1




def test_cube_fingerprint_reads_only_new_or_changed_objects(tmp_path, monkeypatch):
    from archive.catalog.grids import store_fingerprint
    from archive.catalog.store import ShelfFiles
    from archive.ledger import Ledger

    cube = tmp_path / "grids/north.zarr"
    for i in range(5):
        (cube / f"elevation/c/{i}/0/0").parent.mkdir(parents=True, exist_ok=True)
        (cube / f"elevation/c/{i}/0/0").write_bytes(bytes([i]) * (100 + i))
    shelf = ShelfFiles(str(tmp_path))
    plain = store_fingerprint(shelf, "grids/north.zarr")
    read = []
    real = ShelfFiles.sha256
    monkeypatch.setattr(ShelfFiles, "sha256", lambda self, rel: read.append(rel) or real(self, rel))

    with Ledger(tmp_path / "ledger.sqlite") as ledger:
        assert store_fingerprint(shelf, "grids/north.zarr", ledger) == plain and len(read) == 5
        read.clear()
        (cube / "elevation/c/5/0/0").parent.mkdir(parents=True)
        (cube / "elevation/c/5/0/0").write_bytes(b"new epoch")  # one epoch appended
        grown = store_fingerprint(shelf, "grids/north.zarr", ledger)
        assert read == ["grids/north.zarr/elevation/c/5/0/0"]
        assert grown == store_fingerprint(ShelfFiles(str(tmp_path)), "grids/north.zarr")  # same as reading all
        assert grown != plain

        read.clear()
        changed = cube / "elevation/c/2/0/0"
        changed.write_bytes(b"X" * 102)  # same size, new content...
        stamp = changed.stat().st_mtime_ns + 10**9  # ...and a later mtime (file clocks tick in ms)
        os.utime(changed, ns=(stamp, stamp))
        (cube / "elevation/c/0/0/0").unlink()
        after = store_fingerprint(shelf, "grids/north.zarr", ledger)
        assert read == ["grids/north.zarr/elevation/c/2/0/0"]
        assert after == store_fingerprint(ShelfFiles(str(tmp_path)), "grids/north.zarr")
        assert sorted(ledger.object_hashes("grids/north.zarr")) == [f"elevation/c/{i}/0/0" for i in (1, 2, 3, 4, 5)]
