"""write_scan: every row once, Hilbert row groups, spill path == memory path, clean-up, readers agree."""

from __future__ import annotations

import hashlib
import json
import os
from decimal import Decimal

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
from hypothesis import example, given, settings
from hypothesis import strategies as st

from archive.points.coords import decimal_from_units, units_of
from archive.points.hilbert import SiteGrid
from archive.points.sort import Part, _group_of_rows, _radix_order
from archive.points.write import _Moments, write_scan

DEC = pa.decimal128(18, 3)  # what a caller usually has, and what readers get back
N = 61_000
CHUNK = 7_000
GROUP = 2_000
GRID = SiteGrid.from_bounds(1000.0, 2000.0, 1200.0, 2200.0, order=16)


def scan_chunks(n: int = N, chunk: int = CHUNK, seed: int = 3, fail_at: int | None = None, lattice: int = 1):
    """Scan-like chunks: sweep order around a station, exact decimals at 3 places, mixed attributes."""
    for start in range(0, n, chunk):
        if fail_at is not None and start >= fail_at:
            raise RuntimeError("reader broke mid-scan")
        rng = np.random.default_rng((seed, start))
        m = min(chunk, n - start)
        i = np.arange(start, start + m)
        az = 2 * np.pi * (i // 300) / (n // 300)
        r = 5 + 80 * ((i % 300) / 300) ** 2 + rng.normal(0, 0.01, m)
        x = np.rint((1100 + r * np.cos(az)) * 1000 / lattice).astype(np.int64) * lattice
        y = np.rint((2100 + r * np.sin(az)) * 1000 / lattice).astype(np.int64) * lattice
        z = np.rint((50 + 0.1 * r + rng.normal(0, 0.005, m)) * 1000).astype(np.int64)
        deviation = pa.array(rng.integers(-50, 50, m).astype(np.int16), mask=rng.random(m) < 0.1)
        yield pa.table(
            {
                "x": decimal_from_units(x, 3).cast(DEC),
                "y": decimal_from_units(y, 3).cast(DEC),
                "z": decimal_from_units(z, 3).cast(DEC),
                "intensity": pa.array(rng.integers(0, 65535, m).astype(np.uint16)),
                "return_number": pa.array(rng.integers(1, 3, m).astype(np.uint8)),
                "classification": pa.array(rng.integers(0, 6, m).astype(np.uint8)),
                "gps_time": pa.array(1e8 + i * 1e-5),
                "reflectance": pa.array(rng.normal(-5, 2, m).astype(np.float32)),
                "deviation": deviation,
                "synthetic": pa.array(rng.random(m) < 0.2),
            }
        )


def everything() -> pa.Table:
    return pa.concat_tables(scan_chunks())


def canonical(t: pa.Table) -> pa.Table:
    """The table sorted by every column: equal multisets of rows give equal tables."""
    return t.sort_by([(name, "ascending") for name in t.column_names])


META = {"scanshelf": {"scan_id": "north-20260102T030405Z", "crs": {"type": "ProjectedCRS"}}, "other": "kept"}


@pytest.fixture(scope="module")
def memory_file(tmp_path_factory):
    path = str(tmp_path_factory.mktemp("mem") / "scan.parquet")
    seen: list[pa.Table] = []
    written = write_scan(scan_chunks(), path, GRID, metadata=META, row_group_size=GROUP, on_sorted=seen.append)
    return path, written, seen


def test_every_row_arrives_exactly_once(memory_file) -> None:
    path, written, _ = memory_file
    out = pq.read_table(path)
    assert written.rows == out.num_rows == N
    assert canonical(out).equals(canonical(everything()))


def test_row_groups_are_contiguous_hilbert_ranges_in_scan_order(memory_file) -> None:
    path, written, _ = memory_file
    f = pq.ParquetFile(path)
    assert written.row_groups == f.num_row_groups == -(-N // GROUP)
    previous_max = -1
    scan = everything()
    area = lambda x, y: (x.max() - x.min()) * (y.max() - y.min())  # noqa: E731
    scan_area = area(units_of(scan["x"]), units_of(scan["y"]))
    areas = []
    for i in range(f.num_row_groups):
        g = f.read_row_group(i)
        assert g.num_rows == min(GROUP, N - i * GROUP)
        ux, uy = units_of(g["x"]), units_of(g["y"])
        keys = GRID.keys_of_units(ux, uy, 3)
        assert int(keys.min()) >= previous_max  # groups follow each other along the curve
        previous_max = int(keys.max())
        assert (np.diff(g["gps_time"].to_numpy()) > 0).all()  # inside a group: scan order
        areas.append(area(ux, uy))
    assert np.median(areas) < 0.05 * scan_area
    # consecutive rows in arrival (sweep) order cover wedges at least twice as large
    ux, uy = units_of(scan["x"]), units_of(scan["y"])
    wedges = [area(ux[i : i + GROUP], uy[i : i + GROUP]) for i in range(0, N, GROUP)]
    assert np.median(areas) < 0.5 * np.median(wedges)


def test_spill_path_writes_the_same_file(tmp_path, memory_file, monkeypatch) -> None:
    path, written, _ = memory_file
    from archive.points import sort

    buckets = []
    original = sort._SpillStore.buckets
    monkeypatch.setattr(sort._SpillStore, "buckets", lambda self, budget: (buckets.append(1) or b for b in original(self, budget)))
    spill = tmp_path / "spill"
    spill.mkdir()
    other = str(tmp_path / "spilled.parquet")
    w = write_scan(
        scan_chunks(), other, GRID, metadata=META, row_group_size=GROUP, memory_budget=200_000,
        spill_dir=str(spill),
    )
    assert pq.read_table(other).equals(pq.read_table(path))
    assert w.sha256 == written.sha256 and w.size == written.size
    assert len(buckets) > 5  # the spill path was taken, with many buckets
    assert os.listdir(spill) == []  # spill files are gone


def test_spill_path_breaks_ties_of_equal_keys_like_memory(tmp_path) -> None:
    # coordinates on a 5 m lattice: thousands of rows share each key, across chunks and buckets
    paths = [str(tmp_path / f"{b}.parquet") for b in ("memory", "spill")]
    for path, budget in zip(paths, (2**30, 150_000)):
        write_scan(scan_chunks(n=30_000, lattice=5000), path, GRID, metadata={}, row_group_size=700, memory_budget=budget)
    a, b = pq.read_table(paths[0]), pq.read_table(paths[1])
    assert a.equals(b)
    assert len(np.unique(GRID.keys_of_units(units_of(a["x"]), units_of(a["y"]), 3))) < 2000


def test_spill_files_are_removed_when_a_chunk_fails(tmp_path) -> None:
    spill = tmp_path / "spill"
    spill.mkdir()
    with pytest.raises(RuntimeError, match="reader broke"):
        write_scan(
            scan_chunks(fail_at=30_000), str(tmp_path / "x.parquet"), GRID, metadata=META,
            row_group_size=GROUP, memory_budget=100_000, spill_dir=str(spill),
        )
    assert os.listdir(spill) == []


@pytest.mark.parametrize("dtype", [np.uint8, np.int16, np.float32, np.int64])
def test_moments_of_batches_some_constant_equal_numpy(dtype) -> None:
    """Batches that hold one value (most flag columns) and batches that do not, merged."""
    rng = np.random.default_rng(3)
    batches = [np.full(500, 7, dtype), rng.integers(0, 100, 300).astype(dtype), np.full(1, 0, dtype),
               np.full(2_000, 7, dtype), rng.integers(-50 if dtype != np.uint8 else 0, 60, 77).astype(dtype)]
    m = _Moments()
    for b in batches:
        m.add(b)
    every = np.concatenate(batches).astype(np.float64)
    # reference: numpy over the whole column at once
    assert (m.n, m.min, m.max) == (every.size, every.min(), every.max())
    assert m.mean == pytest.approx(every.mean(), rel=1e-12)
    assert np.sqrt(m.m2 / m.n) == pytest.approx(every.std(), rel=1e-12)
    one = _Moments()
    one.add(np.full(10, 3, dtype))
    assert (one.mean, one.m2, one.min, one.max) == (3.0, 0.0, 3.0, 3.0)


def test_checksum_size_and_statistics(memory_file) -> None:
    path, written, _ = memory_file
    data = open(path, "rb").read()
    assert written.sha256 == hashlib.sha256(data).hexdigest()  # reference: hashlib over the file
    assert written.size == len(data)
    scan = everything()
    stats = written.statistics
    for name in ("x", "y", "z"):
        real = units_of(scan[name]) / 1000.0
        assert stats[name].minimum == real.min() and stats[name].maximum == real.max()
        assert stats[name].mean == pytest.approx(real.mean(), abs=1e-9)  # reference: numpy
        assert stats[name].stddev == pytest.approx(real.std(), rel=1e-9)
    dev = scan["deviation"].drop_null().to_numpy().astype(float)
    assert stats["deviation"].mean == pytest.approx(dev.mean()) and stats["deviation"].minimum == dev.min()
    refl = scan["reflectance"].to_numpy().astype(float)
    assert stats["reflectance"].stddev == pytest.approx(refl.std(), rel=1e-9)
    assert written.bbox == tuple(stats[a].minimum for a in "xyz") + tuple(stats[a].maximum for a in "xyz")


def test_on_sorted_sees_whole_row_groups_in_file_order(memory_file) -> None:
    path, written, seen = memory_file
    assert all(len(t) % GROUP == 0 for t in seen[:-1])  # whole row groups, several per table
    # reference: pyarrow's reader, row group by row group
    f = pq.ParquetFile(path)
    whole = pa.concat_tables([f.read_row_group(i) for i in range(f.num_row_groups)]).replace_schema_metadata(None)
    assert pa.concat_tables(seen).cast(whole.schema).equals(whole)  # decimal64 in memory, decimal128 read back


def test_metadata_and_encodings(memory_file) -> None:
    path, _, _ = memory_file
    md = pq.read_metadata(path)
    doc = json.loads(md.metadata[b"scanshelf"])
    assert doc["scan_id"] == META["scanshelf"]["scan_id"] and doc["crs"] == META["scanshelf"]["crs"]
    assert SiteGrid.from_dict(doc["site_grid"]) == GRID and doc["row_group_size"] == GROUP
    assert md.metadata[b"other"] == b"kept"
    names = [md.schema.column(i).name for i in range(md.num_columns)]
    col = {n: md.row_group(0).column(i) for i, n in enumerate(names)}
    assert col["x"].physical_type == "INT64" and "DELTA_BINARY_PACKED" in col["x"].encodings
    assert "BYTE_STREAM_SPLIT" in col["gps_time"].encodings
    assert col["x"].compression == "ZSTD" and col["x"].statistics.has_min_max
    assert pq.read_schema(path).field("x").type == pa.decimal128(18, 3)


def test_file_is_what_pyarrow_writes_for_decimal128_columns(memory_file, tmp_path) -> None:
    """Coordinates travel as decimal64 in memory; the file must not show it."""
    from archive.points.write import Encoding

    path, _, _ = memory_file
    table = pq.read_table(path)  # decimal128 x, y, z, the file's key-value metadata as schema metadata
    assert table.schema.field("x").type == pa.decimal128(18, 3)
    reference = tmp_path / "reference.parquet"
    # reference: pyarrow's own writer, given decimal128 columns and the same options
    pq.write_table(table, reference, row_group_size=GROUP, **Encoding().writer_options(table.schema))
    assert open(reference, "rb").read() == open(path, "rb").read()


def test_duckdb_reads_the_same_points(memory_file) -> None:
    duckdb = pytest.importorskip("duckdb") if os.environ.get("CI") != "true" else __import__("duckdb")
    path, written, _ = memory_file
    # reference: DuckDB's own Parquet reader
    row = duckdb.sql(
        f"select count(*), min(x), max(x), min(y), max(y), min(z), max(z) from read_parquet('{path}')"
    ).fetchall()[0]
    assert row[0] == N
    scan = everything()
    expected = []
    for name in ("x", "y", "z"):
        u = units_of(scan[name])
        expected += [Decimal(int(u.min())).scaleb(-3), Decimal(int(u.max())).scaleb(-3)]
    assert list(row[1:]) == expected
    assert [float(v) for v in row[1:]] == [written.bbox[i] for i in (0, 3, 1, 4, 2, 5)]


def test_hilbert_order_inside_groups_is_available(tmp_path) -> None:
    path = str(tmp_path / "h.parquet")
    write_scan(scan_chunks(n=20_000), path, GRID, metadata={}, row_group_size=GROUP, scan_order=False)
    t = pq.read_table(path)
    keys = GRID.keys_of_units(units_of(t["x"]), units_of(t["y"]), 3)
    assert (np.diff(keys.astype(np.int64)) >= 0).all()


def test_wrong_input_is_refused(tmp_path) -> None:
    bad = pa.table({"x": pa.array([1.0], pa.float32()), "y": [2.0], "z": [3.0]})  # float64 is allowed, float32 not
    with pytest.raises(TypeError, match=r"decimal\(18, k\) or float64"):
        write_scan([bad], str(tmp_path / "b.parquet"), GRID, metadata={})
    with pytest.raises(ValueError, match="empty"):
        write_scan([], str(tmp_path / "c.parquet"), GRID, metadata={})


@settings(max_examples=40, deadline=None)
@given(
    keys=st.lists(st.integers(0, 40), min_size=1, max_size=300),
    size=st.integers(1, 50),
    cuts=st.lists(st.integers(0, 300), max_size=4),
)
def test_group_of_rows_equals_rank_in_a_full_sort(keys, size, cuts) -> None:
    k = np.array(keys, dtype=np.uint32) * np.uint32(70_000)  # spread keys over more than 2^20 bins
    bounds = sorted({c for c in cuts if 0 < c < len(k)})
    parts = [Part(piece, {}, {}) for piece in np.split(k, bounds)]
    # reference: numpy's stable argsort gives the rank in (key, position) order
    rank = np.empty(len(k), dtype=np.int64)
    rank[np.argsort(k, kind="stable")] = np.arange(len(k))
    np.testing.assert_array_equal(_group_of_rows(parts, size), rank // size)


@settings(max_examples=40, deadline=None)
@given(
    spread=st.lists(st.integers(0, 2**20 - 1), max_size=100),
    dense=st.lists(st.integers(0, 40), min_size=1, max_size=600),
    wide=st.booleans(),
    size=st.integers(1, 60),
    seed=st.integers(0, 2**32 - 1),
    parts=st.integers(1, 4),
)
@example(spread=[5, 900_000], dense=list(range(41)) * 10, wide=False, size=7, seed=0, parts=2)
@example(spread=[5, 900_000], dense=list(range(41)) * 10, wide=True, size=7, seed=0, parts=3)
def test_group_of_rows_with_a_dense_spot_equals_rank_in_a_full_sort(spread, dense, wide, size, seed, parts) -> None:
    """Most rows in a few neighbouring keys (the ground next to a scanner), the rest spread over
    the range: the dense bin straddles many groups. With 62-bit keys the finer count cannot reach
    single keys and the last rows are sorted."""
    shift = 42 if wide else 12
    k = np.concatenate([np.array(spread, dtype=np.uint64) << np.uint64(shift),
                        np.uint64(3 << shift) + np.array(dense, dtype=np.uint64)])
    k = k[np.random.default_rng(seed).permutation(len(k))]
    if not wide:
        k = k.astype(np.uint32)
    pieces = [Part(piece, {}, {}) for piece in np.array_split(k, parts) if len(piece)]
    # reference: numpy's stable argsort gives the rank in (key, position) order
    rank = np.empty(len(k), dtype=np.int64)
    rank[np.argsort(k, kind="stable")] = np.arange(len(k))
    np.testing.assert_array_equal(_group_of_rows(pieces, size), rank // size)


@settings(max_examples=40, deadline=None)
@given(values=st.lists(st.integers(0, 2**63 - 1), max_size=200), bits=st.integers(1, 63))
def test_radix_order_is_a_stable_argsort(values, bits) -> None:
    v = np.array(values, dtype=np.uint64) >> np.uint64(63 - bits)  # below 2^bits, many ties for few bits
    # reference: numpy's stable argsort
    np.testing.assert_array_equal(_radix_order(v, bits), np.argsort(v, kind="stable"))


def test_an_error_in_on_sorted_propagates_and_cleans_up(tmp_path) -> None:
    spill = tmp_path / "spill"
    spill.mkdir()

    def broken(table: pa.Table) -> None:
        raise KeyError("binner failed")

    with pytest.raises(KeyError, match="binner failed"):
        write_scan(
            scan_chunks(n=20_000), str(tmp_path / "e.parquet"), GRID, metadata={}, row_group_size=GROUP,
            memory_budget=100_000, spill_dir=str(spill), on_sorted=broken,
        )
    assert os.listdir(spill) == []
