"""Untrusted catalogs, secrets and bit rot.

A shelf read from elsewhere may hold hrefs that leave its root, or JSON built to exhaust the
reader; credentials must never reach a file, a log line or an error message; a flipped byte in
any asset must be found by ``verify``, and ``publish`` must not spread it.
"""

from __future__ import annotations

import ast
import hashlib
import logging
import shutil
from pathlib import Path

import pytest
from click.testing import CliRunner

from tests import factory
from tests.faulty_fs import FaultPlan, Rule
from tests.killing import write_source

ARCHIVE = Path(__file__).resolve().parents[1] / "archive"
SENTINELS = ("SENTINEL-KEY-4f1d2c", "SENTINEL-SECRET-9b7e61", "SENTINEL-TOKEN-0a3c55")


@pytest.fixture(scope="module")
def shelf(tmp_path_factory) -> Path:
    from archive.migrate import migrate

    base = tmp_path_factory.mktemp("catalog")
    write_source(base / "source", "first")
    assert migrate(str(base / "source"), str(base / "shelf"), crs=factory.SITE_CRS).ok  # with previews (PNG)
    return base / "shelf"


def _copy(shelf: Path, tmp_path: Path) -> Path:
    root = tmp_path / "site" / "shelf"
    shutil.copytree(shelf, root)
    return root


# --- untrusted catalogs ----------------------------------------------------------------------

HOSTILE_HREFS = [
    "../outside.parquet", "../../../../../../etc/passwd", "points/../../outside.parquet", "/etc/passwd",
    "file:///etc/passwd", "https://evil.example/x.parquet", "//evil.example/x.parquet",
    "s3://other-bucket/x.parquet", "..\\outside.parquet", "C:/Windows/x.parquet",
]


def _poison_index(root: Path, href: str) -> None:
    """Write a hostile points href straight into the items index (the writer itself refuses them)."""
    import pyarrow as pa
    import pyarrow.parquet as pq

    table = pq.read_table(root / "scans/items.parquet")
    rows = table.to_pylist()
    rows[0]["assets"]["points"]["href"] = href
    pq.write_table(pa.Table.from_pylist(rows, schema=table.schema), root / "scans/items.parquet")


@pytest.mark.parametrize("href", HOSTILE_HREFS)
def test_hrefs_outside_the_root_are_refused_and_never_read(shelf, tmp_path, href) -> None:
    from archive import open_shelf

    root = _copy(shelf, tmp_path)
    first = next(root.rglob("points/**/*.parquet"))
    shutil.copy(first, root.parent / "outside.parquet")  # a real file to be tempted by
    _poison_index(root, href)
    plan = FaultPlan()  # no faults: a spy on every path read
    with pytest.raises(ValueError, match="refused") as err:
        open_shelf(f"faulty://{root}", {"plan": plan}).find().read_points()
    assert href in str(err.value) or repr(href) in str(err.value)
    outside = [p for p in plan.touched if not p.startswith(str(root))]
    assert outside == []


def test_a_huge_catalog_is_refused_without_reading_it_all(shelf, tmp_path) -> None:
    from archive import open_shelf
    from archive.query import shelf as module

    root = _copy(shelf, tmp_path)
    (root / "catalog.json").write_text('{"type": "Catalog", "description": "' + "x" * (module.MAX_JSON_BYTES + 10) + '"}')
    with pytest.raises(ValueError, match="catalog.json.*larger than"):
        open_shelf(str(root))


@pytest.mark.parametrize("where", ["catalog", "item"])
def test_deeply_nested_json_is_refused_clearly(shelf, tmp_path, where) -> None:
    from archive import open_shelf

    root = _copy(shelf, tmp_path)
    deep = "[" * 200_000 + "]" * 200_000
    if where == "catalog":
        (root / "catalog.json").write_text(deep)
        with pytest.raises(ValueError, match="catalog.json"):
            open_shelf(str(root))
        return
    import pyarrow as pa
    import pyarrow.parquet as pq

    table = pq.read_table(root / "scans/items.parquet")
    column = table.column_names.index("item_json")
    table = table.set_column(column, "item_json", pa.array([deep] * table.num_rows))
    pq.write_table(table, root / "scans/items.parquet")
    scans = open_shelf(str(root)).find()
    with pytest.raises(ValueError, match="item_json|nested"):
        scans[0].item


def test_no_pickle_eval_or_exec_on_any_path() -> None:
    """Reading must never run code from data: no eval/exec, pickle, marshal, shelve, unsafe YAML
    or numpy pickles anywhere in the library (dask's own task pickling is not a read path)."""
    banned_calls = {"eval", "exec", "compile", "__import__"}
    banned_modules = {"pickle", "cPickle", "marshal", "shelve", "dill", "cloudpickle", "joblib"}
    found = []
    for path in ARCHIVE.rglob("*.py"):
        tree = ast.parse(path.read_text(), str(path))
        for node in ast.walk(tree):
            if isinstance(node, ast.Call) and isinstance(node.func, ast.Name) and node.func.id in banned_calls:
                found.append(f"{path}:{node.lineno} {node.func.id}()")
            if isinstance(node, (ast.Import, ast.ImportFrom)):
                names = [a.name for a in node.names] + ([node.module] if isinstance(node, ast.ImportFrom) and node.module else [])
                found += [f"{path}:{node.lineno} import {n}" for n in names if n.split(".")[0] in banned_modules]
            if isinstance(node, ast.Attribute) and node.attr in ("read_pickle", "from_pickle") or (
                    isinstance(node, ast.keyword) and node.arg == "allow_pickle"):
                found.append(f"{path}:{node.lineno} {ast.dump(node)[:60]}")
            if isinstance(node, ast.Attribute) and node.attr == "load" and isinstance(node.value, ast.Name) and node.value.id == "yaml":
                found.append(f"{path}:{node.lineno} yaml.load")
    assert found == []


# --- secrets ---------------------------------------------------------------------------------

def test_sentinel_credentials_appear_nowhere_even_when_publish_fails(shelf, tmp_path, monkeypatch, caplog) -> None:
    from archive.cli import cli
    from archive.publish import PublishError, publish

    monkeypatch.setenv("AWS_ACCESS_KEY_ID", SENTINELS[0])
    monkeypatch.setenv("AWS_SECRET_ACCESS_KEY", SENTINELS[1])
    monkeypatch.setenv("AWS_SESSION_TOKEN", SENTINELS[2])
    caplog.set_level(logging.DEBUG)
    root = _copy(shelf, tmp_path)
    messages = []
    options = {"key": SENTINELS[0], "secret": SENTINELS[1], "token": SENTINELS[2], "chatty": True}
    for rules in ([Rule("write", "error", r"", -1)], [Rule("list", "error", r"", -1)],
                  [Rule("write", "lands", r"\.json$", -1)], [Rule("read", "timeout", r"", -1)], []):
        plan = FaultPlan(rules)
        try:
            publish(str(root), f"faulty://{tmp_path / 'dest'}", {**options, "plan": plan}, backoff=0.001)
        except PublishError as exc:
            messages.append(str(exc))
        else:
            messages.append("published")
    assert messages[-1] == "published" and len([m for m in messages if m != "published"]) == 4
    runner = CliRunner()
    out = runner.invoke(cli, ["-vv", "publish", str(root), f"faulty://{tmp_path / 'dest2'}", "-q",
                              "-s", f"key={SENTINELS[0]}", "-s", f"secret={SENTINELS[1]}", "-s", "chatty=true"])
    messages.append(out.output)
    out = runner.invoke(cli, ["verify", f"faulty://{tmp_path / 'dest'}", "--quick", "--storage-option", f"secret={SENTINELS[1]}"])
    messages.append(out.output)
    messages += [r.getMessage() for r in caplog.records]
    leaks = [m for m in messages if any(s in m for s in SENTINELS)]
    assert leaks == []
    for folder in (root, tmp_path / "dest", tmp_path / "dest2"):
        for p in folder.rglob("*"):
            if p.is_file():
                data = p.read_bytes()
                assert not any(s.encode() in data for s in SENTINELS), p


# --- bit rot ---------------------------------------------------------------------------------

def _flip(path: Path, at: float | int | str = 0.5) -> None:
    """Flip the lowest bit of one byte: at a fraction of the file, at a byte offset (negative: from
    the end), or at the middle occurrence of a character."""
    data = bytearray(path.read_bytes())
    if isinstance(at, str):
        hits = [i for i, b in enumerate(data) if b == ord(at)]
        i = hits[len(hits) // 2]
    else:
        i = int(len(data) * at) if isinstance(at, float) else at % len(data)
    data[i] ^= 0x01
    path.write_bytes(bytes(data))


def _parquet_regions(path: Path, column: str | None = None) -> dict[str, int]:
    """Byte offsets inside each region of a Parquet file (reference: Apache Parquet file format:
    "PAR1", column chunks, the Thrift footer, its 4-byte length, "PAR1")."""
    import pyarrow.parquet as pq

    meta = pq.ParquetFile(path).metadata
    size = path.stat().st_size
    footer = int.from_bytes(path.read_bytes()[-8:-4], "little")
    chunk = meta.row_group(0).column(0 if column is None else meta.schema.names.index(column))
    start = chunk.dictionary_page_offset or chunk.data_page_offset
    return {
        "header": 1,  # inside the leading magic
        "data": start + chunk.total_compressed_size // 2,  # inside a column chunk's pages
        "footer": size - 8 - footer // 2,  # inside the Thrift FileMetaData
        "footer length": size - 6,
    }


def _regions() -> list[tuple[str, str, int | None]]:
    """(object kind, region, offset or None for "decide from the file") for every kind the shelf holds."""
    cases = []
    for kind in ("points", "index"):
        cases += [(kind, r, None) for r in ("header", "data", "footer", "footer length")]
    cases += [("index", "item_json column", None)]
    cases += [("cube chunk", "data", 0.5), ("cube metadata", "zarr.json", 0), ("cube metadata", "zarr.json", 0.5),
              ("preview", "png header", 1), ("preview", "png data", 0.6),
              ("item", "json start", 0), ("item", "json middle", 0.5), ("collection", "json quote", '"')]
    return cases


OBJECTS = {
    "points": lambda root: sorted(root.rglob("points/station=north/**/*.parquet"))[0],
    "index": lambda root: root / "scans/items.parquet",
    "cube chunk": lambda root: root / "grids/north.zarr/elevation/c/0/0/0",
    "cube metadata": lambda root: root / "grids/north.zarr/elevation/zarr.json",
    "preview": lambda root: sorted(root.rglob("*.png"))[0],
    "item": lambda root: sorted(root.rglob("scans/items/north/*.json"))[0],
    "collection": lambda root: root / "scans/collection.json",
}
ASSETS = {k: OBJECTS[k] for k in ("points", "cube chunk", "index")}


@pytest.mark.parametrize(("kind", "region", "at"), _regions(), ids=lambda v: str(v))
def test_verify_finds_a_flipped_byte_and_names_the_file(shelf, tmp_path, kind, region, at) -> None:
    from archive.catalog import verify_shelf
    from archive.cli import cli

    root = _copy(shelf, tmp_path)
    assert verify_shelf(str(root)).ok
    target = OBJECTS[kind](root)
    if at is None:
        regions = _parquet_regions(target, "item_json" if region == "item_json column" else None)
        at = regions["data" if region == "item_json column" else region]
    _flip(target, at)
    out = CliRunner().invoke(cli, ["verify", str(root)])
    assert out.exit_code == 1, out.output
    assert "Traceback" not in out.output
    rel = str(target.relative_to(root))
    # a JSON text carries no checksum: the index's copy of an Item tells its damage (by the Item's id)
    named = {"cube chunk": "grids/north.zarr", "cube metadata": "grids/north.zarr"}.get(kind, rel)
    assert (target.stem if region == "json middle" else named) in out.output, out.output
    assert any(w in out.output for w in ("damaged", "not valid JSON", "differs")), out.output


def test_verify_finds_a_flipped_byte_in_the_manifest_of_a_published_copy(shelf, tmp_path) -> None:
    from archive.catalog import verify_shelf
    from archive.publish import publish

    root = _copy(shelf, tmp_path)
    dest = tmp_path / "published"
    publish(str(root), str(dest))
    assert verify_shelf(str(dest)).ok
    data = (dest / "manifest.parquet").read_bytes()
    regions = _parquet_regions(dest / "manifest.parquet")
    # the Thrift footer has no checksum of its own: flip a byte of a column name it holds
    footer_start = len(data) - 8 - int.from_bytes(data[-8:-4], "little")
    regions["footer"] = data.index(b"sha256", footer_start) + 2  # in the schema, which names the columns
    for region, at in regions.items():
        copy = tmp_path / f"copy-{region.replace(' ', '-')}"
        shutil.copytree(dest, copy)
        _flip(copy / "manifest.parquet", at)
        report = verify_shelf(str(copy))
        assert not report.ok and any("manifest.parquet" in p for p in report.problems), (region, report.problems)


def test_the_verify_command_exits_1_and_names_the_file(shelf, tmp_path) -> None:
    from archive.cli import cli

    root = _copy(shelf, tmp_path)
    target = next(root.rglob("points/station=south/**/*.parquet"))
    _flip(target)
    out = CliRunner().invoke(cli, ["verify", str(root)])
    assert out.exit_code == 1
    assert str(target.relative_to(root)) in out.output


@pytest.mark.parametrize("asset", ["points", "cube chunk"])
def test_publish_refuses_to_overwrite_a_good_copy_with_a_corrupt_one(shelf, tmp_path, asset) -> None:
    from archive.publish import PublishError, publish

    root = _copy(shelf, tmp_path)
    dest = tmp_path / "dest"
    publish(str(root), str(dest))
    target = ASSETS[asset](root)
    rel = str(target.relative_to(root))
    good = hashlib.sha256((dest / rel).read_bytes()).hexdigest()
    _flip(target)
    with pytest.raises(PublishError, match="does not match") as err:
        publish(str(root), str(dest))
    assert rel in str(err.value)
    assert hashlib.sha256((dest / rel).read_bytes()).hexdigest() == good
