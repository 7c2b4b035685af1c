"""Faulty storage: publish retries and ends complete and verified, or names exactly the files that
are missing; readers get a clear error, never wrong data.
"""

from __future__ import annotations

import hashlib
import random
from pathlib import Path

import pytest

from tests import factory
from tests.faulty_fs import FaultPlan, Rule
from tests.killing import write_source

FAST = {"backoff": 0.001}  # the same retry schedule, without waiting in tests
SEED = 7


@pytest.fixture(scope="module")
def shelf(tmp_path_factory) -> Path:
    from archive.migrate import migrate

    base = tmp_path_factory.mktemp("storage")
    write_source(base / "source")
    result = migrate(str(base / "source"), str(base / "shelf"), crs=factory.SITE_CRS, previews=False)
    assert result.ok and len(result.converted) == 4
    return base / "shelf"


@pytest.fixture(scope="module")
def published(shelf, tmp_path_factory) -> Path:
    from archive.publish import publish

    dest = tmp_path_factory.mktemp("published") / "site"
    publish(str(shelf), str(dest))
    return dest


def _files(root: Path) -> dict[str, str]:
    return {str(p.relative_to(root)): hashlib.sha256(p.read_bytes()).hexdigest()
            for p in sorted(root.rglob("*")) if p.is_file()}


def _published_part(shelf: Path) -> dict[str, str]:
    return {k: v for k, v in _files(shelf).items() if not k.startswith("ledger.sqlite")}


def test_publish_retries_through_transient_faults_and_verifies(shelf, tmp_path) -> None:
    from archive.publish import publish

    plan = FaultPlan([
        Rule("write", "error", r"\.parquet$", 2),
        Rule("write", "timeout", r"zarr/elevation/", 2),
        Rule("write", "lands", r"collection\.json$", 1),
        Rule("write", "short", r"scans/items/", 1),  # lands truncated: only the read-back can tell
        Rule("read", "short", r"points/", 1),  # the read-back itself is cut short once
        Rule("read", "timeout", r"zarr\.json$", 1),
    ])
    dest = tmp_path / "dest"
    report = publish(str(shelf), f"faulty://{dest}", {"plan": plan}, **FAST)
    assert all(rule.times == 0 for rule in plan.rules), plan.rules  # every fault fired
    files = _files(dest)
    assert {k: v for k, v in files.items() if k != "manifest.parquet"} == _published_part(shelf)
    assert not [k for k in files if ".publishing" in k]
    assert len(report.uploaded) == len(_published_part(shelf))
    print(f"\nFIGURE storage faults injected into one publish (all recovered): {len(plan.injected)}")


def test_publish_names_exactly_the_files_that_stay_missing(shelf, tmp_path) -> None:
    from archive.publish import PublishError, publish

    dest = tmp_path / "dest"
    broken = r"points/station=north/.*T120000Z\.parquet$|points/station=south/.*T180000Z\.parquet$"
    plan = FaultPlan([Rule("write", "error", broken, -1)])
    with pytest.raises(PublishError) as err:
        publish(str(shelf), f"faulty://{dest}", {"plan": plan}, retries=3, **FAST)
    want = ["points/station=north/year=2026/north-20260901T120000Z.parquet",
            "points/station=south/year=2026/south-20260901T180000Z.parquet"]
    assert err.value.missing == want
    for path in want:
        assert path in str(err.value)
    assert len(plan.injected) == 2 * 3  # every attempt of both files, no more
    assert not (dest / "catalog.json").exists()  # readers never see a half-published shelf
    again = publish(str(shelf), str(dest))  # storage healthy again: only what is missing goes up
    assert sorted(p for p in again.uploaded if p.startswith("points/")) == want
    assert {k: v for k, v in _files(dest).items() if k != "manifest.parquet"} == _published_part(shelf)


def test_publish_to_storage_that_cannot_even_be_listed_fails_clearly(shelf, tmp_path) -> None:
    from archive.publish import PublishError, publish

    dest = tmp_path / "dest"
    plan = FaultPlan([Rule("list", "error", r"", -1)])
    with pytest.raises(PublishError, match="did not verify") as err:
        publish(str(shelf), f"faulty://{dest}", {"plan": plan}, retries=2, **FAST)
    assert "points/station=north/year=2026/north-20260901T060000Z.parquet" in err.value.missing
    assert not (dest / "catalog.json").exists()


@pytest.mark.parametrize("kind", ["error", "timeout", "short"])
@pytest.mark.parametrize("target", [r"points/.*\.parquet$", r"scans/items\.parquet$", r"catalog\.json$"])
def test_readers_get_a_clear_error_never_wrong_data(published, kind, target) -> None:
    from archive import open_shelf

    good = open_shelf(str(published)).find().read_points()
    plan = FaultPlan([Rule("read", kind, target, -1)])
    with pytest.raises((OSError, ValueError, TimeoutError)) as err:
        open_shelf(f"faulty://{published}", {"plan": plan}).find().read_points()
    assert plan.injected
    message = str(err.value)
    # the error names the very file whose read failed (shelf-relative), not just any Parquet file
    failed = {path.split(str(published).lstrip("/") + "/", 1)[-1] for _, _, path in plan.injected}
    assert any(rel in message for rel in failed), (failed, message)
    assert good.num_rows == 11_000


def test_random_single_faults_while_reading_never_give_wrong_points(published) -> None:
    """Many reads, each with one fault somewhere: the result is the right table or an error."""
    from archive import open_shelf

    want = open_shelf(str(published)).find().read_points(bbox=(500050, 7650050, 500250, 7650250))
    rng = random.Random(SEED)
    outcomes = {"error": 0, "right": 0}
    for _ in range(30):
        plan = FaultPlan([Rule("read", rng.choice(["error", "timeout", "short"]),
                               rng.choice([r"points/", r"north-", r"south-", r"items\.parquet", r"\.parquet$"]),
                               rng.choice([1, 2, -1]))])
        try:
            got = open_shelf(f"faulty://{published}", {"plan": plan}).find().read_points(
                bbox=(500050, 7650050, 500250, 7650250))
        except (OSError, ValueError, TimeoutError):
            outcomes["error"] += 1
            continue
        assert got.equals(want), plan.injected
        outcomes["right"] += 1
    assert outcomes["error"] > 0
    print(f"\nFIGURE read faults injected: 30 reads, {outcomes['error']} clear errors, "
          f"{outcomes['right']} right answers, 0 wrong answers")


def test_publish_stops_at_once_on_a_permanent_error(shelf, tmp_path) -> None:
    """Access denied cannot be cured by retrying: the first refusal ends the publish, with a message
    that says so, instead of every file being tried again and again."""
    from archive.publish import PublishError, publish

    plan = FaultPlan([Rule("write", "denied", r"", -1)])
    with pytest.raises(PublishError, match="A retry cannot cure this") as err:
        publish(str(shelf), f"faulty://{tmp_path / 'dest'}", {"plan": plan}, workers=1, retries=4, **FAST)
    assert err.value.permanent
    assert len(plan.injected) == 1  # one refusal, no retries, no further files
    assert not (tmp_path / "dest/catalog.json").exists()


def test_publish_command_to_a_file_is_a_usage_error_at_once(shelf, tmp_path) -> None:
    """`publish SHELF file`: one line, exit 2, no retries and no flood of warnings (even without -q)."""
    from click.testing import CliRunner

    from archive.cli import cli

    blocker = tmp_path / "afile"
    blocker.write_text("x")
    for dest in (blocker, blocker / "sub"):
        out = CliRunner().invoke(cli, ["publish", str(shelf), str(dest)])
        assert out.exit_code == 2, out.output
        assert "is a file, not a folder" in out.output and len(out.output.splitlines()) <= 3, out.output
