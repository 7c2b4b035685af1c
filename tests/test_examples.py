"""Every example runs: the end-to-end demo (the README's `make demo`), and the Python examples."""

from __future__ import annotations

import json
import os
import subprocess
import sys
from pathlib import Path

import laspy
import pytest

from archive.demo import DemoTruth

ROOT = Path(__file__).resolve().parents[1]
BIN = Path(sys.executable).parent


def _run(args: list[str], cwd: Path, timeout: int = 600) -> subprocess.CompletedProcess:
    env = dict(os.environ, PATH=f"{BIN}:{os.environ['PATH']}", MPLBACKEND="Agg")
    return subprocess.run(args, cwd=cwd, env=env, capture_output=True, text=True, timeout=timeout)


@pytest.fixture(scope="module")
def demo_run(tmp_path_factory) -> Path:
    work = tmp_path_factory.mktemp("demo")
    done = _run(["bash", str(ROOT / "examples/run_demo.sh"), str(work)], cwd=work)
    assert done.returncode == 0, done.stdout[-3000:] + done.stderr[-3000:]
    return work


def test_demo_end_to_end_keeps_every_good_point(demo_run):
    truth = DemoTruth.load(demo_run / "demo-truth.json")
    shelf = demo_run / "shelf"
    items = [json.loads(p.read_text()) for p in (shelf / "scans/items").rglob("*.json")]
    converted = {i["id"]: i["properties"]["pc:count"] for i in items}
    # every good file, and the one whose CRS the site file gives, arrives with all its points, once
    good = {f.scan_id: f.point_count for f in truth.point_files if f.fault is None or f.fault.kind == "no_crs"}
    assert converted == good
    for path in ("catalog.json", "scans/items.parquet", "index.html", "grids/north.zarr/zarr.json"):
        assert (shelf / path).exists() and (demo_run / "published" / path).exists(), path
    assert not (demo_run / "published/ledger.sqlite").exists()
    subset = laspy.read(str(demo_run / "subset.laz"))  # reference: laspy reads our LAZ
    assert len(subset.points) > 0
    assert (demo_run / "report.html").stat().st_size > 100_000


def test_every_planted_fault_is_reported(demo_run):
    truth = DemoTruth.load(demo_run / "demo-truth.json")
    log = (demo_run / "shelf/survey.parquet")
    import pyarrow.parquet as pq

    survey = {r["relpath"]: r for r in pq.read_table(log).to_pylist()}
    for f in truth.point_files:
        if f.fault is None or f.fault.kind == "no_crs":  # the site file supplies the CRS
            continue
        assert survey[f.path]["status"] in ("damaged", "duplicate", "unusable"), f.path


def test_remote_subset_example(demo_run, tmp_path):
    done = _run([sys.executable, str(ROOT / "examples/remote_subset.py"), str(demo_run / "published")], cwd=tmp_path)
    assert done.returncode == 0, done.stderr[-3000:]
    assert "scan(s) of station" in done.stdout


def test_make_demo_example(tmp_path):
    done = _run([sys.executable, str(ROOT / "examples/make_demo.py"), str(tmp_path / "d")], cwd=tmp_path)
    assert done.returncode == 0, done.stderr[-3000:]
    assert "fault truncated" in done.stdout


def test_demo_change_map_shows_the_thinning(demo_run):
    import numpy as np

    import archive

    truth = DemoTruth.load(demo_run / "demo-truth.json")
    north = sorted(f.scan_time for f in truth.point_files if f.station == "north" and f.fault is None)
    change = archive.elevation_change(str(demo_run / "shelf"), "north", north[0], north[-1])
    d = change.change.values
    assert change.valid_cells > 1000
    # the ice thins by centimetres a day (demo model); weeks apart, a tenth of the cells drop > 0.3 m
    assert np.nanpercentile(d, 10) < -0.3
    assert abs(np.nanpercentile(d, 90)) < 0.1  # rock and the far slope stay put


def test_the_script_exit_codes_and_flushed_output(tmp_path) -> None:
    """`scanshelf` ends through archive.cli._end (os._exit after Python's exit handlers): codes and
    output must come through as a normal exit would give them."""
    ok = _run(["scanshelf", "--help"], cwd=tmp_path)
    assert ok.returncode == 0 and "migrate" in ok.stdout
    missing = _run(["scanshelf", "find", str(tmp_path / "nowhere")], cwd=tmp_path)
    assert missing.returncode == 2 and "no catalog.json" in missing.stderr
    unknown = _run(["scanshelf", "no-such-command"], cwd=tmp_path)
    assert unknown.returncode == 2 and "No such command" in unknown.stderr


@pytest.mark.parametrize("given, expected", [(None, "1"), ("2", "2")])
def test_the_script_gives_numpy_one_blas_thread_unless_told_otherwise(tmp_path, given, expected) -> None:
    """No command does linear algebra, and OpenBLAS's idle threads spin ~0.1 CPU-s at numpy's
    import: the script sets OPENBLAS_NUM_THREADS=1 before numpy loads, unless the user set it."""
    code = ("import atexit, os, sys; sys.argv = ['scanshelf', '--version']; "
            "atexit.register(lambda: print('blas', os.environ.get('OPENBLAS_NUM_THREADS'), 'numpy' in sys.modules)); "
            "from archive.cli import main; main()")
    env = {k: v for k, v in os.environ.items() if k != "OPENBLAS_NUM_THREADS"}
    if given is not None:
        env["OPENBLAS_NUM_THREADS"] = given
    done = subprocess.run([sys.executable, "-c", code], cwd=tmp_path, env=env, capture_output=True, text=True, timeout=60)
    assert done.returncode == 0, done.stderr
    assert done.stdout.splitlines()[-1] == f"blas {expected} False"
