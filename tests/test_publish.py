"""Publishing: order, resume, verification, dry runs and keeping credentials out."""

from __future__ import annotations

import hashlib
import io
import logging
import uuid

import fsspec
import pyarrow.parquet as pq
import pytest
from click.testing import CliRunner
from fsspec.implementations.memory import MemoryFileSystem

from archive import layout
from archive.cli.publish import publish as publish_command
from archive.publish import PublishError, phase_of, publish
from tests.servers import S3_SECRET, s3_endpoint, shelf_dir  # noqa: F401 (fixtures)


def memory_url() -> str:
    return f"memory://pub-{uuid.uuid4().hex[:8]}"


def source_files(root) -> dict[str, bytes]:
    return {p.relative_to(root).as_posix(): p.read_bytes() for p in root.rglob("*") if p.is_file()}


def test_order_data_first_root_last(shelf_dir, monkeypatch):
    root, _ = shelf_dir
    order: list[str] = []
    put, pipe = MemoryFileSystem.put_file, MemoryFileSystem.pipe_file

    def record_put(self, lpath, rpath, *a, **k):
        order.append(rpath)
        return put(self, lpath, rpath, *a, **k)

    def record_pipe(self, path, *a, **k):
        order.append(path)
        return pipe(self, path, *a, **k)

    monkeypatch.setattr(MemoryFileSystem, "put_file", record_put)
    monkeypatch.setattr(MemoryFileSystem, "pipe_file", record_pipe)
    dest = memory_url()
    report = publish(str(root), dest, workers=4)
    rel = [p.split("/", 2)[2] for p in order]
    assert rel[-1] == layout.CATALOG and rel[-2] == layout.MANIFEST
    assert layout.LEDGER not in rel
    phases = [phase_of(p) for p in rel]
    assert phases == sorted(phases)  # every data object before any metadata that points at it
    assert rel.index(layout.SCANS_INDEX) > max(i for i, p in enumerate(rel) if p.startswith("points/"))
    zarr_root = f"{layout.grid_path('north')}/zarr.json"
    assert rel.index(zarr_root) > max(i for i, p in enumerate(rel) if "/c/" in p)
    expected = {p for p in source_files(root) if p != layout.LEDGER}
    assert set(report.uploaded) == expected


def test_second_publish_skips_everything(shelf_dir):
    root, _ = shelf_dir
    dest = memory_url()
    first = publish(str(root), dest)
    again = publish(str(root), dest)
    assert again.uploaded == [] and sorted(again.skipped) == sorted(first.uploaded)
    rehashed = publish(str(root), dest, rehash=True)
    assert rehashed.uploaded == []


def test_manifest_lists_every_file(shelf_dir):
    root, _ = shelf_dir
    dest = memory_url()
    publish(str(root), dest)
    fs, base = fsspec.url_to_fs(dest)
    manifest = pq.read_table(io.BytesIO(fs.cat_file(f"{base}/{layout.MANIFEST}"))).to_pylist()
    files = source_files(root)
    assert {m["path"] for m in manifest} == set(files) - {layout.LEDGER}
    for m in manifest:
        assert m["size"] == len(files[m["path"]])
        assert m["sha256"] == hashlib.sha256(files[m["path"]]).hexdigest()


def test_interrupted_publish_resumes(shelf_dir, tmp_path, monkeypatch):
    root, _ = shelf_dir
    dest = tmp_path / "site"
    calls = {"n": 0}
    real = fsspec.implementations.local.LocalFileSystem.put_file

    def dies_after_five(self, lpath, rpath, *a, **k):
        calls["n"] += 1
        if calls["n"] > 5:
            raise ConnectionError("link dropped")
        return real(self, lpath, rpath, *a, **k)

    monkeypatch.setattr(fsspec.implementations.local.LocalFileSystem, "put_file", dies_after_five)
    with pytest.raises(PublishError, match="upload failed"):
        publish(str(root), str(dest), workers=1)
    assert not (dest / layout.CATALOG).exists()  # readers see no shelf yet
    landed = {p.relative_to(dest).as_posix() for p in dest.rglob("*") if p.is_file() and not p.name.startswith(".")}
    assert len(landed) == 5
    monkeypatch.setattr(fsspec.implementations.local.LocalFileSystem, "put_file", real)
    # one landed file silently damaged, same size: it must be sent again (no manifest to trust yet)
    victim = min(landed)
    data = bytearray((dest / victim).read_bytes())
    data[0] ^= 0xFF
    (dest / victim).write_bytes(bytes(data))
    resumed = publish(str(root), str(dest))
    assert set(resumed.skipped) == landed - {victim}
    assert victim in resumed.uploaded
    for path, content in source_files(root).items():
        if path != layout.LEDGER:
            assert (dest / path).read_bytes() == content


def test_verification_failure_keeps_the_root_away(shelf_dir, monkeypatch):
    root, _ = shelf_dir
    real = MemoryFileSystem.put_file

    def truncating(self, lpath, rpath, *a, **k):
        real(self, lpath, rpath, *a, **k)
        if rpath.endswith(".parquet") and "/points/" in rpath:
            self.pipe_file(rpath, self.cat_file(rpath)[:-1])

    monkeypatch.setattr(MemoryFileSystem, "put_file", truncating)
    dest = memory_url()
    with pytest.raises(PublishError, match="did not verify"):
        publish(str(root), dest)
    fs, base = fsspec.url_to_fs(dest)
    assert not fs.exists(f"{base}/{layout.CATALOG}")
    assert not fs.exists(f"{base}/{layout.SCANS_INDEX}")


def test_cli_retries_sets_the_attempts_per_file(shelf_dir, monkeypatch):
    root, _ = shelf_dir
    real = MemoryFileSystem.put_file
    attempts: dict[str, int] = {}

    def truncating(self, lpath, rpath, *a, **k):
        real(self, lpath, rpath, *a, **k)
        if rpath.endswith(".parquet") and "/points/" in rpath:
            attempts[rpath] = attempts.get(rpath, 0) + 1
            self.pipe_file(rpath, self.cat_file(rpath)[:-1])

    monkeypatch.setattr(MemoryFileSystem, "put_file", truncating)
    result = CliRunner().invoke(publish_command, [str(root), memory_url(), "--retries", "2", "-q"])
    assert result.exit_code != 0 and "did not verify" in result.output
    assert attempts and set(attempts.values()) == {2}, attempts


def test_dry_run_writes_nothing(shelf_dir):
    root, _ = shelf_dir
    dest = memory_url()
    result = CliRunner().invoke(publish_command, [str(root), dest, "--dry-run"])
    assert result.exit_code == 0, result.output
    assert "would upload" in result.output and layout.SCANS_INDEX in result.output
    fs, base = fsspec.url_to_fs(dest)
    assert not fs.exists(base) or fs.find(base) == []


def test_refuses_what_is_not_a_shelf(tmp_path, shelf_dir):
    root, _ = shelf_dir
    with pytest.raises(PublishError, match="no catalog.json"):
        publish(str(tmp_path), memory_url())
    with pytest.raises(PublishError, match="the shelf itself"):
        publish(str(root), str(root))


def test_credentials_stay_out(shelf_dir, s3_endpoint, caplog, monkeypatch):
    root, _ = shelf_dir
    for name in ("AWS_ACCESS_KEY_ID", "AWS_SECRET_ACCESS_KEY"):
        monkeypatch.delenv(name, raising=False)  # only the command line carries them
    caplog.set_level(logging.DEBUG, logger="archive")
    dest = f"s3://{s3_endpoint.bucket}/creds-{uuid.uuid4().hex[:6]}"
    args = [str(root), dest, "-s", f"endpoint_url={s3_endpoint.endpoint}",
            "-s", "key=scanshelf-test-key", "-s", f"secret={S3_SECRET}"]
    result = CliRunner().invoke(publish_command, args)
    assert result.exit_code == 0, result.output
    assert S3_SECRET not in result.output and S3_SECRET not in caplog.text
    fs = fsspec.filesystem("s3", **s3_endpoint.options, skip_instance_cache=True)
    published = fs.find(dest)
    assert any(p.endswith(layout.CATALOG) for p in published)
    for path in published:
        assert S3_SECRET.encode() not in fs.cat_file(path)
    # an error names the destination, never the secret
    bad = CliRunner().invoke(publish_command, [str(root), "s3://no-such-bucket-here/x", "-s",
                                               f"endpoint_url={s3_endpoint.endpoint}", "-s",
                                               "key=scanshelf-test-key", "-s", f"secret={S3_SECRET}"])
    assert bad.exit_code != 0
    assert S3_SECRET not in bad.output and S3_SECRET not in caplog.text
    assert "no-such-bucket-here" in bad.output
    assert not (root / "manifest.parquet").exists()  # nothing written into the shelf


def test_options_from_fsspec_config(shelf_dir, s3_endpoint, monkeypatch):
    """No options given: fsspec's own configuration (file or FSSPEC_S3_* variables) applies."""
    root, _ = shelf_dir
    monkeypatch.setitem(fsspec.config.conf, "s3", dict(s3_endpoint.options))
    dest = f"s3://{s3_endpoint.bucket}/conf-{uuid.uuid4().hex[:6]}"
    report = publish(str(root), dest)
    assert layout.CATALOG in report.uploaded
    assert report.dest == dest  # shown as given: no endpoint, key or secret attached
