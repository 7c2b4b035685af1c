"""Hostile and broken inputs: each gives a clear error naming the file and the cause, in bounded
time and memory, and the rest of the run goes on. Plus property tests of the readers and the sort.
"""

from __future__ import annotations

import functools
import io
import json
import re
import sqlite3
import tempfile
from decimal import Decimal
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
from hypothesis import HealthCheck, example, given, settings
from hypothesis import strategies as st

from tests import factory, hostile, killing

TIME_LIMIT = 240  # seconds for the whole corpus run; a header that sends a reader looping fails it
MEMORY_LIMIT_MIB = 1500  # peak of the whole run, libraries included


@pytest.fixture(scope="module")
def corpus_run(tmp_path_factory):
    base = tmp_path_factory.mktemp("hostile")
    source, shelf = base / "source", base / "shelf"
    cases = hostile.build(source)
    run = killing.run(["migrate", str(source), str(shelf), "--crs", factory.SITE_CRS, "--no-previews", "-q"],
                      kill_after=TIME_LIMIT, log_dir=base / "logs")
    db = sqlite3.connect(f"file:{shelf / 'ledger.sqlite'}?mode=ro&immutable=1", uri=True)
    try:
        rows = {r[0]: r[1:] for r in db.execute("SELECT relpath, status, error, scan_id FROM files")}
    finally:
        db.close()
    return base, cases, run, rows, shelf


def test_the_run_ends_in_bounded_time_and_memory_with_a_summary(corpus_run) -> None:
    base, cases, run, rows, shelf = corpus_run
    assert not run.killed, f"the run did not end within {TIME_LIMIT} s"
    assert run.exitcode == 1, run.output  # bad files make the exit code 1, never a crash
    assert "Traceback" not in run.output
    assert run.peak_mib is not None and run.peak_mib < MEMORY_LIMIT_MIB, run.peak_mib
    assert "not converted:" in run.output
    print(f"\nFIGURE hostile inputs tried (migrate corpus): {len(cases)} files, {run.seconds:.1f} s, "
          f"peak {run.peak_mib:.0f} MiB")


def test_each_hostile_file_gets_its_own_clear_outcome(corpus_run) -> None:
    base, cases, run, rows, shelf = corpus_run
    wrong = []
    for case in cases:
        status, error, scan_id = rows.get(case.relpath, (None, None, None))
        if case.expect == "refused":
            if status != "failed" or not re.search(case.cause, error or "", re.IGNORECASE):
                wrong.append(f"{case.relpath!r}: expected refusal matching {case.cause!r}, got {status}: {error}")
            elif "\n" not in case.relpath and f"  {case.relpath}: " not in run.output:
                wrong.append(f"{case.relpath!r}: refused but not named in the summary")
        elif case.expect == "ignored":
            if status != "ignored":
                wrong.append(f"{case.relpath!r}: expected ignored, got {status}: {error}")
        elif case.expect == "converted":
            if status != "done":
                wrong.append(f"{case.relpath!r}: expected converted, got {status}: {error}")
                continue
            path = next((shelf / "points").rglob(f"{scan_id}.parquet"))
            if pq.ParquetFile(path).metadata.num_rows != case.points:
                wrong.append(f"{case.relpath!r}: {pq.ParquetFile(path).metadata.num_rows} points, want {case.points}")
    assert wrong == []


def test_shell_metacharacters_in_names_are_never_run(corpus_run) -> None:
    base, *_ = corpus_run
    assert not list(base.rglob("pwned")) and not Path("pwned").exists()


def test_survey_names_each_bad_file_and_cause(corpus_run) -> None:
    base, cases, run, rows, shelf = corpus_run
    table = pq.read_table(shelf / "survey.parquet").to_pylist()
    by_path = {r["relpath"]: r for r in table}
    for case in cases:
        if case.expect in ("refused", "ignored"):
            text = "; ".join(by_path[case.relpath]["problems"])
            assert re.search(case.cause, text, re.IGNORECASE) or case.cause == "", (case.relpath, text)


# --- property tests: readers never fail unclearly ----------------------------------------------

@functools.lru_cache(maxsize=1)
def _las_bytes() -> bytes:
    """A small valid LAS 1.4 file (with a CRS VLR and extra bytes) to damage."""
    with tempfile.TemporaryDirectory() as tmp:
        path = Path(tmp) / "base.las"
        factory.write_las(path, 200, factory.utc(2026, 9, 1, 6), seed=3)
        return path.read_bytes()


class _Bytes:
    """An opener over bytes in memory (the reader protocol takes a callable returning a file)."""

    def __init__(self, data: bytes) -> None:
        self.data = data

    def __call__(self):
        return io.BytesIO(self.data)


def _read_all(reader) -> int:
    reader.measure()
    return sum(t.num_rows for t in reader.chunks(1000, salvage=True))


@settings(max_examples=60, deadline=5000, suppress_health_check=[HealthCheck.too_slow])
@given(patches=st.lists(st.tuples(st.integers(0, 374), st.binary(min_size=1, max_size=8)), min_size=1, max_size=4))
@example(patches=[(95, b"\x1a#\x82\x86\x92\xae\xb0\xfc")])  # point data offset beyond the file: laspy looped over 16M VLRs
def test_las_headers_with_random_bytes_give_a_clear_error_or_points(patches) -> None:
    from archive.sources import LasReader, SourceError

    data = bytearray(_las_bytes())
    for offset, chunk in patches:
        data[offset : offset + len(chunk)] = chunk
    data[:4] = b"LASF"
    relpath = "north/fuzzed header.las"
    try:
        reader = LasReader(_Bytes(bytes(data)), relpath, len(data))
        n = _read_all(reader)
    except SourceError as exc:
        assert relpath in str(exc)
        return
    assert 0 <= n <= len(data)  # never more points than bytes


@settings(max_examples=60, deadline=5000, suppress_health_check=[HealthCheck.too_slow])
@given(lines=st.lists(st.text(alphabet=st.sampled_from(list("0123456789.,;\t -+eEnaif\ufeff\u00a0x#")), max_size=40),
                      min_size=1, max_size=30))
def test_ascii_with_random_rows_gives_a_clear_error_or_finite_points(lines) -> None:
    from archive.sitefile import load_site_file
    from archive.sources import AsciiReader, SourceError

    data = ("X,Y,Z\n1.5,2.5,3.5\n" + "\n".join(lines) + "\n").encode()
    relpath = "south/fuzzed rows.csv"
    try:
        reader = AsciiReader(_Bytes(data), relpath, len(data), load_site_file(None, factory.SITE_CRS))
        tables = list(reader.chunks(1000, salvage=True))
    except SourceError as exc:
        assert relpath in str(exc)
        return
    for t in tables:
        for axis in "xyz":
            values = t.column(axis).cast(pa.float64()).to_numpy()
            assert np.isfinite(values).all()


@settings(max_examples=40, deadline=5000)
@given(values=st.lists(st.tuples(st.integers(-10**9, 10**9), st.integers(-10**9, 10**9), st.integers(-10**6, 10**6)),
                       min_size=1, max_size=50),
       places=st.integers(0, 6))
def test_ascii_decimals_round_trip_exactly(values, places) -> None:
    """Text → DECIMAL keeps the written decimal exactly (reference: Python's decimal module)."""
    from archive.points.coords import units_of
    from archive.sitefile import load_site_file
    from archive.sources import AsciiReader

    def text(v: int) -> str:
        return str(Decimal(v).scaleb(-places)) if places else str(v)

    rows = [",".join(text(v) for v in row) for row in values]
    data = ("X,Y,Z\n" + "\n".join(rows) + "\n").encode()
    reader = AsciiReader(_Bytes(data), "south/exact.csv", len(data), load_site_file(None, factory.SITE_CRS))
    table = pa.concat_tables(reader.chunks(1000))
    k = reader.header.axes["x"].places
    for i, axis in enumerate("xyz"):
        got = units_of(table.column(axis))
        want = [Decimal(text(row[i])).scaleb(k) for row in values]
        assert [Decimal(int(g)) for g in got] == want


# --- property tests: the Hilbert sort is a permutation and the round trip is exact ---------------

COMMON_SCALES = (0.001, 0.0001, 0.01, 0.00025)  # common practice of the trade for TLS exports
COMMON_OFFSETS = (0.0, 500000.0, -123.5, 7650000.0)


@settings(max_examples=40, deadline=10000, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(
    raw=st.lists(st.tuples(st.integers(-2**31, 2**31 - 1), st.integers(-2**31, 2**31 - 1),
                           st.integers(-2**20, 2**20), st.integers(0, 3)), min_size=1, max_size=300),
    scale=st.sampled_from(COMMON_SCALES),
    offset=st.sampled_from(COMMON_OFFSETS),
    group=st.integers(1, 64),
    chunk=st.integers(1, 120),
    spill=st.booleans(),
)
def test_sort_is_a_permutation_and_the_las_formula_survives(tmp_path, raw, scale, offset, group, chunk, spill) -> None:
    from archive.points.coords import AxisEncoding, units_of
    from archive.points.hilbert import SiteGrid
    from archive.points.write import write_scan

    enc = AxisEncoding.for_las(scale, offset)
    arr = np.array(raw, dtype=np.int64)
    source = pa.table({
        "x": enc.from_las(arr[:, 0]), "y": enc.from_las(arr[:, 1]), "z": enc.from_las(arr[:, 2]),
        "classification": pa.array(arr[:, 3].astype(np.uint8)),
        "row": pa.array(np.arange(len(arr), dtype=np.int64)),
    })
    xs, ys = arr[:, 0] * scale + offset, arr[:, 1] * scale + offset
    grid = SiteGrid.from_bounds(xs.min(), ys.min(), xs.max(), ys.max(), order=12)
    chunks = [source.slice(i, chunk) for i in range(0, len(arr), chunk)]
    dest = tmp_path / f"sorted-{group}-{chunk}-{spill}.parquet"
    write_scan(iter(chunks), str(dest), grid, metadata={"scanshelf": {}}, row_group_size=group,
               memory_budget=1 if spill else 1 << 30, spill_dir=str(tmp_path))
    pf = pq.ParquetFile(dest)
    back = pf.read()
    order = back.column("row").to_numpy()
    assert sorted(order.tolist()) == list(range(len(arr)))  # a permutation: every row exactly once
    for axis, i in (("x", 0), ("y", 1), ("z", 2)):
        got = enc.to_float(units_of(back.column(axis)))
        # reference: ASPRS LAS 1.4, "Point Data Records": coordinate = X * scale + offset
        assert np.array_equal(got, arr[order, i].astype(np.float64) * scale + offset)
    assert np.array_equal(back.column("classification").to_numpy(), arr[order, 3].astype(np.uint8))
    keys = grid.keys_of_units(units_of(back.column("x")), units_of(back.column("y")), enc.places)
    bounds = np.cumsum([0] + [pf.metadata.row_group(g).num_rows for g in range(pf.num_row_groups)])
    ranges = [(keys[a:b].min(), keys[a:b].max()) for a, b in zip(bounds[:-1], bounds[1:])]
    assert all(hi <= lo for (_, hi), (lo, _) in zip(ranges[:-1], ranges[1:]))  # groups: ascending key ranges
    assert json.loads(pf.schema_arrow.metadata[b"scanshelf"])["row_group_size"] == group
