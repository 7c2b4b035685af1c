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
    assert migrate(str(base / "source"), str(base / "shelf"), crs=factory.SITE_CRS, previews=False).ok
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

def _flip(path: Path, at: float = 0.5) -> None:
    data = bytearray(path.read_bytes())
    i = int(len(data) * at)
    data[i] ^= 0x01
    path.write_bytes(bytes(data))


ASSETS = {
    "points": lambda root: next(root.rglob("points/station=north/**/*.parquet")),
    "cube chunk": lambda root: root / "grids/north.zarr/elevation/c/0/0/0",
    "index": lambda root: root / "scans/items.parquet",
}


@pytest.mark.parametrize("asset", list(ASSETS))
@pytest.mark.parametrize("at", [0.3, 0.5])
def test_verify_finds_a_flipped_byte_and_names_the_file(shelf, tmp_path, asset, at) -> None:
    from archive.catalog import verify_shelf

    root = _copy(shelf, tmp_path)
    assert verify_shelf(str(root)).ok
    target = ASSETS[asset](root)
    _flip(target, at)
    report = verify_shelf(str(root))
    assert not report.ok
    rel = str(target.relative_to(root))
    named = rel if asset != "cube chunk" else "grids/north.zarr"
    assert any(named in p for p in report.problems), report.problems


def test_verify_finds_a_flipped_byte_in_the_index_footer(shelf, tmp_path) -> None:
    from archive.catalog import verify_shelf

    root = _copy(shelf, tmp_path)
    _flip(root / "scans/items.parquet", 0.9)
    assert any("scans/items.parquet" in p for p in verify_shelf(str(root)).problems)


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
