"""`watch`: rounds of incremental migration and publishing that survive bad files and outages."""

from __future__ import annotations

import io
import json
import logging

import pyarrow.parquet as pq
import pytest
from click.testing import CliRunner

from archive import layout
from archive.cli.report import report_command, watch_command
from archive.watch import RoundResult, parse_duration, watch
from tests.factory import SITE_CRS, utc, write_las


def test_parse_duration():
    assert parse_duration("10m") == 600
    assert parse_duration("1h") == 3600
    assert parse_duration("30s") == 30
    assert parse_duration("1h30m") == 5400
    assert parse_duration("0.1") == pytest.approx(0.1)
    assert parse_duration(" 2 m ") == 120
    assert parse_duration("0.5d") == 43200
    assert parse_duration(7) == 7.0
    for bad in ("", "10x", "m", "-5s", "ten minutes"):
        with pytest.raises(ValueError, match="duration"):
            parse_duration(bad)


def _index_ids(root) -> list[str]:
    return sorted(pq.read_table(root / layout.SCANS_INDEX, columns=["id"]).column("id").to_pylist())


def test_three_rounds_pick_up_a_new_scan_and_publish_it(tmp_path, caplog):
    source, shelf, dest = tmp_path / "source", tmp_path / "shelf", tmp_path / "www"
    write_las(source / "east/e_20260901_060000.las", 3_000, utc(2026, 9, 1, 6), seed=11)
    (source / "east/broken.las").write_bytes(b"LASF" + b"\0" * 50)  # a bad file from the start

    def drop_new_file(one: RoundResult) -> None:
        if one.round == 1:  # lands in the source between rounds 1 and 2
            write_las(source / "east/e_20260901_120000.las", 2_000, utc(2026, 9, 1, 12), seed=12)

    with caplog.at_level(logging.INFO, logger="archive.watch"):
        result = watch(str(source), str(shelf), every=0.1, publish_to=str(dest), rounds=3, crs=SITE_CRS,
                       report=False, on_round=drop_new_file)
    r1, r2, r3 = result.rounds
    assert r1.new_scans == ["east-20260901T060000Z"] and r1.failed == 1 and r1.new_failed == ["east/broken.las"]
    assert r2.new_scans == ["east-20260901T120000Z"] and r2.failed == 1 and r2.new_failed == []
    assert r3.new_scans == [] and r3.errors == [] and not result.interrupted
    assert r1.published > 0 and r2.published > 0
    assert r3.published <= 1  # nothing new; at most the survey table is re-sent
    assert _index_ids(dest) == ["east-20260901T060000Z", "east-20260901T120000Z"]
    assert (dest / "points/station=east/year=2026/east-20260901T120000Z.parquet").exists()
    assert (dest / layout.CATALOG).exists() and not (dest / layout.LEDGER).exists()
    lines = [r.getMessage() for r in caplog.records if r.getMessage().startswith("round ")]
    assert len(lines) == 3 and lines[1].startswith("round 2: 1 new scan(s), 1 failed file(s) (0 new)")


def test_failing_publish_is_logged_and_the_loop_carries_on(tmp_path):
    source, shelf = tmp_path / "source", tmp_path / "shelf"
    write_las(source / "east/e_20260901_060000.las", 2_000, utc(2026, 9, 1, 6), seed=13)
    blocker = tmp_path / "not-a-folder"
    blocker.write_text("a file where the destination folder should be")

    result = watch(str(source), str(shelf), every=0.05, publish_to=str(blocker / "www"), rounds=2,
                   crs=SITE_CRS, report=False)
    assert len(result.rounds) == 2
    for one in result.rounds:
        assert one.published is None
        assert len(one.errors) == 1 and one.errors[0].startswith("publish: ")
        assert "errors: publish" in one.line()
    assert result.rounds[0].new_scans == ["east-20260901T060000Z"]
    assert (shelf / layout.CATALOG).exists()  # the shelf itself kept being updated


def test_unreachable_source_is_retried_and_ctrl_c_ends_cleanly(tmp_path):
    missing = tmp_path / "unmounted"
    seen: list[RoundResult] = []

    def stop_after_two(one: RoundResult) -> None:
        seen.append(one)
        if one.round == 2:
            raise KeyboardInterrupt

    result = watch(str(missing), str(tmp_path / "shelf"), every=0.01, report=False, on_round=stop_after_two)
    assert result.interrupted and len(result.rounds) == 2
    assert all(r.errors and r.errors[0].startswith("migrate: FileNotFoundError") for r in seen)


def test_cli_one_watch_round_then_a_report_as_json(tmp_path):
    source, shelf = tmp_path / "source", tmp_path / "shelf"
    write_las(source / "east/e_20260901_060000.las", 1_500, utc(2026, 9, 1, 6), seed=14)
    out = CliRunner().invoke(watch_command, [str(source), str(shelf), "--rounds", "1", "--every", "1s",
                                             "--crs", SITE_CRS, "--no-report", "--json"])
    assert out.exit_code == 0, out.output
    rounds = [json.loads(line) for line in io.StringIO(out.output) if line.strip()]
    assert len(rounds) == 1 and rounds[0]["round"] == 1 and rounds[0]["new_scans"] == ["east-20260901T060000Z"]
    bad = CliRunner().invoke(watch_command, [str(source), str(shelf), "--every", "soon"])
    assert bad.exit_code == 2 and "--every" in bad.output

    # the report of this one-scan shelf: coverage, elevation and density, no change map yet
    page = tmp_path / "out" / "health.html"
    out = CliRunner().invoke(report_command, [str(shelf), "-o", str(page), "--json"])
    assert out.exit_code == 0, out.output
    summary = json.loads(out.output)
    assert summary["stations"] == ["east"] and summary["scans"] == 1 and summary["points"] == 1_500
    assert summary["images"] == 3 and summary["gaps"] == 0 and summary["size"] == page.stat().st_size
    html = page.read_text("utf-8")
    assert "One epoch: no change to show yet." in html
    assert 'href="../shelf/catalog.json"' in html  # links lead back to the shelf from elsewhere on disk
