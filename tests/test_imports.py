"""What a `scanshelf` run and a dask worker load before doing any work.

Every ``scanshelf`` command and every dask worker imports ``archive.cli`` or ``archive.migrate``;
xarray, dask, zarr, pandas, matplotlib and rasterio must wait until a function needs them
(archive/lazy.py and function-level imports). Each check runs in a fresh interpreter and reads
``sys.modules`` there (reference: the Python import system), so an eager import anywhere on
the path fails it by name.
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]
HEAVY = ("xarray", "dask", "zarr", "matplotlib", "pandas", "rasterio")


def _loaded_after(code: str) -> set[str]:
    """Top-level package names in ``sys.modules`` after running ``code`` in a new interpreter."""
    probe = code + "\nimport json, sys\nprint(json.dumps(sorted({m.partition('.')[0] for m in sys.modules})))"
    env = {**os.environ, "PYTHONPATH": os.pathsep.join(filter(None, [str(ROOT), os.environ.get("PYTHONPATH")]))}
    run = subprocess.run([sys.executable, "-c", probe], capture_output=True, text=True, env=env, cwd=ROOT, check=False)
    assert run.returncode == 0, run.stderr
    return set(json.loads(run.stdout.splitlines()[-1]))


@pytest.mark.parametrize("module", ["archive.migrate", "archive.cli", "archive"])
def test_startup_does_not_load_the_heavy_libraries(module):
    loaded = _loaded_after(f"import {module}")
    assert "archive" in loaded  # the probe did import the package
    assert sorted(loaded & set(HEAVY)) == []


def test_zero_config_site_file_does_not_load_jsonschema():
    loaded = _loaded_after("from archive.sitefile import load_site_file\nload_site_file(None)")
    assert "jsonschema" not in loaded


def test_footprint_outline_does_not_load_scipy_or_rasterio():
    """scipy.ndimage alone cost every migrate process about a third of a CPU-second, rasterio
    (GDAL's start-up, and boto3 where installed) a fifth.

    shapely 2 and pyproj 3.7, which the outline does need, load neither.
    """
    code = """
import numpy as np
from archive.catalog.footprint import outline
from pyproj import CRS
mask = np.zeros((20, 30), bool)
mask[2:18, 3:25] = True
mask[8:12, 10:15] = False  # a hole to fill
geometry = outline(mask, (2.0, 0, 500000.0, 0, -2.0, 7650200.0), CRS.from_epsg(32633).to_wkt())
assert geometry["type"] == "Polygon", geometry
"""
    loaded = _loaded_after(code)
    assert {"archive", "shapely", "pyproj"} <= loaded  # the outline was traced
    assert sorted(loaded & {"scipy", "rasterio", "boto3"}) == []


def test_zero_config_migrate_of_las_scans_does_not_load_xarray_or_dask(tmp_path):
    """A whole ``scanshelf migrate SOURCE SHELF`` run: cubes created and appended, previews,
    catalog (grids described) and index.html (maps and changes drawn), all without xarray or dask."""
    from tests import factory

    for i, hour in enumerate((6, 12, 18)):  # three epochs of one station: change maps are drawn
        factory.write_las(tmp_path / "source" / "north" / f"scan_{i}.las", 20_000, factory.utc(2026, 9, 1, hour), seed=i)
    factory.write_las(tmp_path / "source" / "south" / "scan.las", 10_000, factory.utc(2026, 9, 2, 6), seed=9)
    shelf = tmp_path / "shelf"
    loaded = _loaded_after(f"""
from click.testing import CliRunner
from archive.cli import cli
run = CliRunner().invoke(cli, ["migrate", {str(tmp_path / "source")!r}, {str(shelf)!r}, "-q"])
assert run.exit_code == 0, run.output
""")
    assert {"archive", "zarr", "matplotlib"} <= loaded  # the run did grid and draw
    assert sorted(loaded & {"xarray", "dask", "rasterio", "boto3"}) == []
    # the run made everything a zero-config run makes, so nothing was skipped on the way
    assert sorted(p.name for p in (shelf / "grids").iterdir()) == ["collection.json", "north.zarr", "south.zarr"]
    assert len(list((shelf / "previews").iterdir())) == 4
    assert (shelf / "index.html").read_text().count("data:image/png") == 8  # 2 coverage charts, 2 + 2 maps, 2 changes


def test_the_probe_sees_a_heavy_import():
    """The check above can fail: asking for ``elevation_change`` does pull in xarray."""
    loaded = _loaded_after("from archive import elevation_change")
    assert {"xarray", "pandas"} <= loaded


def test_public_names_resolve_to_their_definitions():
    code = """
import importlib
import archive.migrate, archive.publish, archive.survey  # submodules that share their names with functions
from archive import migrate, publish, survey
for function in (migrate, publish, survey, archive.migrate, archive.publish, archive.survey):
    assert callable(function) and function.__module__ == "archive." + function.__name__, function
for package in ("archive", "archive.grids", "archive.catalog", "archive.report"):
    mod = importlib.import_module(package)
    for name in mod.__all__:
        value = getattr(mod, name)
        assert getattr(value, "__name__", name) == name, (package, name, value)
        assert name in dir(mod), (package, name)
try:
    archive.no_such_name
except AttributeError as exc:
    assert "no_such_name" in str(exc)
else:
    raise AssertionError("archive.no_such_name resolved")
"""
    _loaded_after("import archive\n" + code)
    # the other order: the function first, then the submodule import must not replace it
    _loaded_after("from archive import survey\nimport archive.survey\nassert archive.survey is survey, archive.survey")
