"""LAS and LAZ through laspy (lazrs for LAZ), read in chunks with damage detected up front."""

from __future__ import annotations

import math
import mmap
import os
import stat
import struct
from contextlib import ExitStack
from typing import Callable, Iterator

import numpy as np
import pyarrow as pa

from archive.points.coords import AxisEncoding, LossyEncoding
from archive.points.rows import Rows, held_records, keys_of_axes, numeric_array
from archive.sources.base import DamagedSource, ReadTally, SourceError, SourceHeader, value_range

LAS_SIGNATURE = b"LASF"
RAW_HEADER = 375  # the LAS 1.4 public header block; older versions use its first 227 bytes
VLR_HEADER = 54  # ASPRS LAS: reserved (2), user id (16), record id (2), length after header (2), description (32)
EVLR_HEADER = 60  # ASPRS LAS 1.4: as a VLR header but with an 8-byte length
COORDINATE_LIMIT = 1e15  # metres (or feet, or millimetres): no real frame reaches this
WAVEFORM_FORMATS = (4, 5, 9, 10)  # point formats with a wave packet descriptor (ASPRS LAS 1.3/1.4)
# measure()'s reused read buffer: 512 KiB-4 MiB cost alike (benchmarks/survey_inspect.py), and it
# must exceed the survey's READ_BUFFER so a read goes straight to the file, not through a copy
MEASURE_BYTES = 2 << 20


def _laspy():
    try:
        import laspy
    except ImportError:  # pragma: no cover - laspy is a core dependency
        raise SourceError("reading LAS needs laspy: pip install 'laspy[lazrs]'") from None
    return laspy


class LasReader:
    """One LAS/LAZ file. ``opener`` returns a fresh binary file object (local or fsspec)."""

    def __init__(self, opener, relpath: str, size: int, renames=None) -> None:
        self._opener = opener
        self.relpath = relpath
        self.size = size
        self._renames = renames or (lambda name: name)
        self.tally = ReadTally()
        self.header = self._read_header()

    def _read_header(self) -> SourceHeader:
        laspy = _laspy()
        with self._opener() as fh:
            vlr_problems = _check_raw_header(fh, self.relpath, self.size)
        try:
            with self._opener() as fh, laspy.open(fh) as reader:
                h = reader.header
                try:
                    crs = h.parse_crs()
                except Exception as exc:  # a broken CRS VLR is a problem of this file, not the run
                    crs = None
                    problems = [f"CRS record could not be parsed ({exc}); give --crs"]
                else:
                    problems = []
                header = SourceHeader(
                    format="laz" if reader.header.are_points_compressed else "las",
                    version=str(h.version),
                    point_format=int(h.point_format.id),
                    declared_count=int(h.point_count),
                    crs_wkt=crs.to_wkt() if crs is not None else None,
                    bounds=(*map(float, h.mins), *map(float, h.maxs)),
                    axes={a: AxisEncoding.for_las(h.scales[i], h.offsets[i]) for i, a in enumerate("xyz")},
                    adjusted_gps_time=bool(int(h.global_encoding.gps_time_type) == 1),
                    columns=tuple(self._renames(n) for n in h.point_format.dimension_names if n not in ("X", "Y", "Z")),
                    problems=problems + vlr_problems,
                    creation_date=h.creation_date if h.creation_date and h.creation_date.year >= 1980 else None,
                )
                self.codec = LasCodec(h.point_format, h.scales, h.offsets, header.axes, self._renames, self.relpath)
                self._offset = int(h.offset_to_point_data)
                self._record = int(h.point_format.size)
                self._evlr_start = int(getattr(h, "start_of_first_evlr", 0) or 0)
                waveform = _waveform_note(h, self.relpath)
                if waveform:
                    header.notes.append(waveform)
                wave_start = int(getattr(h, "start_of_waveform_data_packet_record", 0) or 0)
                if h.global_encoding.waveform_data_packets_internal and wave_start > self._offset:
                    # the wave packets (an EVLR in 1.4, a bare record in 1.3) follow the points
                    self._evlr_start = min(self._evlr_start, wave_start) if self._evlr_start > self._offset else wave_start
                legacy = getattr(h, "legacy_point_count", None)
        except SourceError:
            raise
        except Exception as exc:
            raise SourceError(f"{self.relpath}: not a readable LAS/LAZ header ({exc}); the file may be damaged or not LAS") from None
        if header.format == "las":
            end = self._evlr_start if self._evlr_start > self._offset else self.size
            stored = max(0, end - self._offset) // self._record
            if stored != header.declared_count:
                header.problems.append(
                    f"header declares {header.declared_count} points but the file holds {stored} "
                    f"({'truncated, or a header count too large' if stored < header.declared_count else 'extra data after the points'})"
                )
            self._stored = min(stored, header.declared_count) if stored < header.declared_count else stored
        else:
            self._stored = header.declared_count
        if legacy and header.declared_count and legacy != header.declared_count and header.declared_count < 2**32:
            header.problems.append(f"legacy point count {legacy} disagrees with point count {header.declared_count}")
        if header.declared_count == 0:
            header.problems.append("file declares zero points")
        return header

    def rows(self, chunk_size: int = 2_000_000, salvage: bool = False) -> Rows:
        """The points as the file's own records (see archive.points.rows), keyed and decoded by ``codec``."""
        return Rows(self.codec, self._arrays(chunk_size, salvage))

    def chunks(self, chunk_size: int = 2_000_000, salvage: bool = False) -> Iterator[pa.Table]:
        for records in self._arrays(chunk_size, salvage):
            yield self.codec.decode(records)

    def _arrays(self, chunk_size: int, salvage: bool) -> Iterator[np.ndarray]:
        for records in self._records(chunk_size, salvage):
            if records.dtype != self.codec.dtype:
                raise SourceError(f"{self.relpath}: points have the layout {records.dtype}, the header says {self.codec.dtype}")
            if "gps_time" in records.dtype.names:
                self.tally.note_times(records["gps_time"])
            yield records

    def measure(self, chunk_size: int = 4_000_000) -> tuple[float, ...] | None:
        """Count, bounds and time range of the readable points, straight from the raw records.

        Uncompressed points are read through one reused buffer of about ``MEASURE_BYTES`` (no
        fresh pages per chunk, and the reductions run on memory still in cache); LAZ is
        decompressed by laspy in chunks of ``chunk_size``.
        """
        lows, highs = np.full(3, np.iinfo(np.int64).max), np.full(3, np.iinfo(np.int64).min)
        buffer = None
        if self.header.format == "las":
            buffer = np.empty(max(1, MEASURE_BYTES // self.codec.dtype.itemsize), self.codec.dtype)
            chunk_size = len(buffer)
        timed = "gps_time" in self.codec.dtype.names
        for raw in self._records(chunk_size, salvage=True, into=buffer):
            for i, name in enumerate(("X", "Y", "Z")):
                lo, hi = value_range(raw[name])
                lows[i] = min(lows[i], int(lo))
                highs[i] = max(highs[i], int(hi))
            if timed:
                self.tally.note_times(raw["gps_time"])
        if self.tally.points == 0:
            return None
        axes = [self.header.axes[a] for a in "xyz"]
        low = [v * e.scale + e.offset for e, v in zip(axes, lows)]  # ASPRS LAS: X * scale + offset
        high = [v * e.scale + e.offset for e, v in zip(axes, highs)]
        return (*low, *high)

    def _records(self, chunk_size: int, salvage: bool, into: np.ndarray | None = None) -> Iterator[np.ndarray]:
        """The readable points' records (structured arrays of ``codec.dtype``); damage raises
        unless ``salvage``. Uncompressed points of a local file are read-only views of its mapped
        pages (see `_mapped_records`); other uncompressed points are read straight into the array
        (laspy's reader costs 3x more CPU on the same bytes), a fresh one per chunk, or views of
        ``into`` (at least ``chunk_size`` records) that the next chunk overwrites; LAZ is
        decompressed by laspy and ignores ``into``."""
        header = self.header
        if header.problems and not salvage:
            raise DamagedSource(f"{self.relpath}: {'; '.join(header.problems)}; use --salvage to keep the readable points")
        self.tally.problems.extend(p for p in header.problems if p not in self.tally.problems)
        want = self._stored if header.format == "las" else header.declared_count
        with ExitStack() as stack:
            fh = stack.enter_context(self._opener())
            if header.format == "las":
                read = _uncompressed_reader(fh, self._offset, self.codec.dtype, into)
            else:
                reader = stack.enter_context(_laspy().open(fh))
                read = lambda n: reader.read_points(n).array  # noqa: E731
            done = 0
            while done < want:
                n = min(chunk_size, want - done)
                try:
                    records = read(n)
                except Exception as exc:
                    message = f"points unreadable after {done} of {want} ({type(exc).__name__}: {exc})"
                    if not salvage:
                        raise DamagedSource(f"{self.relpath}: {message}; use --salvage to keep the points before it") from None
                    self.tally.problems.append(message)
                    break
                if len(records) == 0:
                    message = f"file ends after {done} of {want} declared points"
                    if not salvage:
                        raise DamagedSource(f"{self.relpath}: {message}; use --salvage to keep them") from None
                    self.tally.problems.append(message)
                    break
                done += len(records)
                self.tally.points += len(records)
                yield records


def _uncompressed_reader(fh, offset: int, dtype: np.dtype, into: np.ndarray | None) -> Callable[[int], np.ndarray]:
    """``read(n)``: the next records of the points at byte ``offset`` of ``fh``, mapped where it is
    a local file and ``into`` is not given, else read; a file system that cannot map a file (some
    FUSE and network mounts) is read from where mapping failed."""
    fd = _local_file(fh) if into is None else None
    position = offset
    fh.seek(offset)

    def read(n: int) -> np.ndarray:
        nonlocal fd, position
        if fd is not None:
            try:
                records = _mapped_records(fd, position, n, dtype)
            except OSError:
                fd = None
                fh.seek(position)
            else:
                position += records.nbytes
                return records
        return _read_records(fh, n, dtype, into)

    return read


def _local_file(fh) -> int | None:
    """The descriptor of ``fh`` where it is a regular local file (which can be mapped), else None."""
    try:
        fd = fh.fileno()
        return fd if stat.S_ISREG(os.fstat(fd).st_mode) else None
    except (AttributeError, OSError, ValueError):  # remote and in-memory files: io.UnsupportedOperation
        return None


def _mapped_records(fd: int, offset: int, n: int, dtype: np.dtype) -> np.ndarray:
    """Up to ``n`` whole point records at byte ``offset`` of a local file (fewer where it ends), as
    a read-only view of its pages.

    Mapping copies nothing and takes no fresh memory: reading 680 MB of records into new pages
    cost 1.1-2.8 CPU-s on our test machine (the copy, and the kernel's first touch of every
    page), mapping them under 0.1 s. The mapping lives as long as the array (or a view of it).
    The price: a file cut short by another program while it is mapped stops the process with
    SIGBUS, where a read would have raised; the sources of a migration are not to be rewritten
    while it runs (a rerun resumes where it stopped).
    """
    k = max(0, min(n, (os.fstat(fd).st_size - offset) // dtype.itemsize))
    if k == 0:
        return np.empty(0, dtype)
    start = offset - offset % mmap.ALLOCATIONGRANULARITY  # mappings begin on that boundary
    mapped = mmap.mmap(fd, offset - start + k * dtype.itemsize, access=mmap.ACCESS_READ, offset=start)
    if hasattr(mapped, "madvise"):  # read ahead the whole chunk now (a slow or network disk)
        mapped.madvise(mmap.MADV_WILLNEED)
    return np.frombuffer(mapped, dtype, count=k, offset=offset - start)


def _read_records(fh, n: int, dtype: np.dtype, into: np.ndarray | None = None) -> np.ndarray:
    """Up to ``n`` whole point records from ``fh`` (ASPRS LAS: fixed-size records, little-endian),
    fewer where the file ends; in a fresh array, or in the first ``n`` records of ``into``."""
    out = held_records(n, dtype) if into is None else into[:n]
    view = memoryview(out.view(np.uint8))
    got = 0
    while got < view.nbytes:
        step = fh.readinto(view[got:])
        if not step:
            break
        got += step
    return out[: got // dtype.itemsize]


class LasCodec:
    """LAS point records (the file's own layout, ``PointFormat.dtype()``) as rows for the sort.

    Keys come straight from the integers X, Y; ``decode`` gives one column per dimension: x, y, z
    through their ``AxisEncoding`` (plus ``<axis>_raw`` where kept), bit fields unpacked with their
    ASPRS masks, plain fields copied, and scaled or array-valued extra bytes through laspy's own
    record view, so every value is the one laspy reads.
    """

    def __init__(self, point_format, scales, offsets, axes: dict[str, AxisEncoding], renames, relpath: str):
        from laspy.point.dims import get_sub_fields_dict

        self.point_format = point_format
        self.dtype = point_format.dtype()
        self.axes = axes
        self.relpath = relpath
        self._scales, self._offsets = np.asarray(scales), np.asarray(offsets)
        self._renames = renames
        bits = get_sub_fields_dict(int(point_format.id))
        self._plan: list[tuple[str, str, tuple]] = []  # (how, dimension, details)
        for name in point_format.dimension_names:
            if name in ("X", "Y", "Z"):
                continue
            if name in bits:
                composed, field = bits[name]
                self._plan.append(("bits", name, (composed, field.mask, (field.mask & -field.mask).bit_length() - 1)))
                continue
            dim = point_format.dimension_by_name(name)
            plain = not dim.is_scaled and dim.num_elements == 1 and name in self.dtype.names
            self._plan.append(("field" if plain else "laspy", name, ()))
        # a LAS point has every field: the columns are REQUIRED in Parquet, which also spares the
        # writer a definition level per value (about 30 % of write_table's CPU on LAS format 6)
        empty = self._columns(np.zeros(0, self.dtype))
        self.schema = pa.schema([pa.field(name, array.type, nullable=False) for name, array in empty.items()])

    def keys(self, records: np.ndarray, grid) -> np.ndarray:
        ex, ey = self.axes["x"], self.axes["y"]
        if ex.kind == ey.kind == "decimal" and ex.places == ey.places:  # the stored units, made in cache
            (sx, hx), (sy, hy) = ex.las_units, ey.las_units
            return grid.keys_of_units(records["X"], records["Y"], ex.places, (sx, sy), (hx, hy))
        values = []
        for enc, raw in ((ex, "X"), (ey, "Y")):
            if enc.kind == "float":
                values.append(records[raw].astype(np.float64) * enc.scale + enc.offset)  # ASPRS LAS 1.4
            else:
                values.append(enc.units(records[raw]))
        return keys_of_axes(grid, *values, ex.type, ey.type)

    def decode(self, records: np.ndarray) -> pa.Table:
        return pa.Table.from_arrays(list(self._columns(records).values()), schema=self.schema)

    def _columns(self, records: np.ndarray) -> dict[str, pa.Array]:
        columns: dict[str, pa.Array] = {}
        for axis, raw in zip("xyz", ("X", "Y", "Z")):
            try:
                columns[axis] = self.axes[axis].from_las(records[raw])
            except LossyEncoding as exc:
                raise SourceError(f"{self.relpath}: {axis}: {exc}; please report this file") from None
        for axis, raw in zip("xyz", ("X", "Y", "Z")):
            if self.axes[axis].raw:  # integers not recoverable from float64: keep them
                columns[f"{axis}_raw"] = numeric_array(records[raw].astype(np.int32))
        view = None
        packed: dict[str, np.ndarray] = {}  # bit-field bytes, copied out of the records once
        for how, name, details in self._plan:
            if how == "bits":
                composed, mask, shift = details
                if composed not in packed:
                    packed[composed] = np.ascontiguousarray(records[composed])
                values = np.bitwise_and(packed[composed], mask)
                np.right_shift(values, shift, out=values)
            elif how == "field":
                values = np.ascontiguousarray(records[name])
            else:
                if view is None:
                    import laspy

                    view = laspy.ScaleAwarePointRecord(records, self.point_format, self._scales, self._offsets)
                values = np.asarray(view[name])
                if values.ndim > 1:  # array-valued extra bytes: one column per element
                    for i in range(values.shape[1]):
                        columns[f"{self._renames(name)}_{i}"] = numeric_array(values[:, i])
                    continue
            if values.dtype == np.bool_:
                values = values.astype(np.uint8)
            columns[self._renames(name)] = numeric_array(values)
        return columns


def _check_raw_header(fh, relpath: str, size: int) -> list[str]:
    """Refuse header fields that would send a reader into huge loops, allocations or wrong numbers.

    Offsets follow the ASPRS LAS 1.2/1.4 public header block (see tests/hostile.py). Returns the
    problems that still leave the points readable (a VLR running into the point data).
    """
    raw = fh.read(RAW_HEADER)
    if len(raw) < 227:
        return []  # laspy names a short header itself
    header_size, offset, n_vlr = struct.unpack_from("<HII", raw, 94)
    if offset < header_size:
        raise SourceError(f"{relpath}: the point data offset ({offset}) lies inside the {header_size}-byte header; the header is damaged")
    if n_vlr * VLR_HEADER > min(offset, size) - header_size:  # a huge count sends laspy into a long loop
        raise SourceError(
            f"{relpath}: the header declares {n_vlr} VLRs, but only {min(offset, size) - header_size} bytes follow "
            "the header before the point data (or the end of the file); the header is damaged"
        )
    for i, axis in enumerate("xyz"):
        scale, shift = struct.unpack_from("<d", raw, 131 + 8 * i)[0], struct.unpack_from("<d", raw, 155 + 8 * i)[0]
        if not (math.isfinite(scale) and scale > 0):
            raise SourceError(f"{relpath}: the {axis} scale in the header is {scale!r}, not a positive number; the header is damaged")
        if not math.isfinite(shift):
            raise SourceError(f"{relpath}: the {axis} offset in the header is {shift!r}; the header is damaged")
        if abs(shift) + scale * 2**31 > COORDINATE_LIMIT:
            raise SourceError(
                f"{relpath}: {axis} scale {scale!r} and offset {shift!r} give coordinates beyond {COORDINATE_LIMIT:.0e} "
                "in size, far outside any coordinate system on Earth; the header is damaged"
            )
    if raw[25] >= 4 and header_size >= RAW_HEADER and len(raw) >= RAW_HEADER:
        evlr_start, n_evlr = struct.unpack_from("<QI", raw, 235)
        if n_evlr and (evlr_start < offset or evlr_start + n_evlr * EVLR_HEADER > size):
            raise SourceError(
                f"{relpath}: the header declares {n_evlr} extended VLRs from byte {evlr_start}, which do not fit "
                f"in the {size}-byte file after the point data; the header is damaged"
            )
    problems = []
    pos = header_size
    for i in range(n_vlr):
        fh.seek(pos)
        vlr = fh.read(VLR_HEADER)
        if len(vlr) < VLR_HEADER:
            break  # laspy reports the short file
        end = pos + VLR_HEADER + struct.unpack_from("<H", vlr, 20)[0]
        if end > offset:
            user = vlr[2:18].rstrip(b"\0").decode("ascii", "replace")
            problems.append(f"VLR {i} ({user}) runs {end - offset} bytes into the point data")
            break
        pos = end
    return problems


def _waveform_note(h, relpath: str) -> str | None:
    """Where the waveform samples of a wave-packet point format are, and that they are not carried.

    The points keep their wave packet descriptor fields (index, offset, size, location, x_t, y_t,
    z_t); the samples themselves stay in the source file (or its .wdp) and are not copied.
    """
    if int(h.point_format.id) not in WAVEFORM_FORMATS:
        return None
    enc = h.global_encoding
    if enc.waveform_data_packets_external:
        where = f"in the external file {relpath.rsplit('.', 1)[0]}.wdp"
    elif enc.waveform_data_packets_internal:
        where = f"inside the file from byte {int(getattr(h, 'start_of_waveform_data_packet_record', 0) or 0)}"
    else:
        where = "nowhere (the header flags neither internal nor external wave packets)"
    return (f"point format {int(h.point_format.id)} carries waveform descriptors; the waveform samples, {where}, "
            "are not carried into the shelf (keep the source file for them)")


def looks_like_las(head: bytes) -> bool:
    return head[:4] == LAS_SIGNATURE
