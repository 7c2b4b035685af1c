"""ASCII point exports (CSV, semicolon, tab or space separated), streamed through pyarrow's CSV reader.

Values are read as text and checked with one vectorised pattern, so a malformed row is counted
and reported instead of aborting the whole file; coordinates become exact decimals with the
number of places the file itself uses.
"""

from __future__ import annotations

import io
import re
from typing import Iterator

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.csv as pcsv

from archive.points.coords import MAX_DIGITS, AxisEncoding
from archive.sources.base import DamagedSource, ReadTally, SourceError, SourceHeader

SAMPLE_BYTES = 256 * 1024
MAX_PLACES = 9
_NUMBER = r"^[ \t]*(?:[-+]?(?:\d+\.?\d*|\.\d+)(?:[eE][-+]?\d+)?|[-+]?(?i:nan|inf|infinity))[ \t]*$"
_FINITE_NUMBER = r"^[ \t]*[-+]?(?:\d+\.?\d*|\.\d+)(?:[eE][-+]?\d+)?[ \t]*$"
_ALIASES = {
    "x": "x", "easting": "x", "east": "x",
    "y": "y", "northing": "y", "north": "y",
    "z": "z", "elevation": "z", "height": "z", "altitude": "z",
    "intensity": "intensity", "int": "intensity", "amplitude": "intensity",
    "gpstime": "gps_time", "gps_time": "gps_time",
}
_DELIMITERS = [",", ";", "\t", "|", " "]


def normalise_name(name: str) -> str:
    """Header text → a plain column name (``GPS Time`` → ``gps_time``); known aliases → x, y, z, ..."""
    plain = re.sub(r"[^0-9a-zA-Z]+", "_", name.strip().lstrip("\ufeff")).strip("_").lower() or "column"
    return _ALIASES.get(plain.replace("_", ""), _ALIASES.get(plain, plain))


class AsciiReader:
    """One delimited text export."""

    def __init__(self, opener, relpath: str, size: int, site_file) -> None:
        self._opener = opener
        self.relpath = relpath
        self.size = size
        self._site_file = site_file
        self.tally = ReadTally()
        self.header = self._sniff()

    def _sniff(self) -> SourceHeader:
        with self._opener() as fh:
            raw = fh.read(SAMPLE_BYTES)
        self._bom = 3 if raw.startswith(b"\xef\xbb\xbf") else 0
        try:
            text = raw[self._bom :].decode("utf-8")
        except UnicodeDecodeError:
            text = raw[self._bom :].decode("latin-1")
        lines = text.splitlines()
        if len(raw) == SAMPLE_BYTES and lines:
            lines = lines[:-1]  # the last sampled line may be cut
        comment = self._site_file.ascii_comment
        self._skip = 0
        while self._skip < len(lines) and (not lines[self._skip].strip() or (comment and lines[self._skip].lstrip().startswith(comment))):
            self._skip += 1
        body = [ln for ln in lines[self._skip :] if ln.strip()]
        if not body:
            raise SourceError(f"{self.relpath}: no data rows found; is this a point export?")
        self._delimiter = self._pick_delimiter(body[:200])
        first = self._split(body[0])
        has_header = not all(re.match(_NUMBER, tok) for tok in first)
        if has_header:
            names = [normalise_name(self._site_file.rename(tok.strip())) for tok in first]
            self._skip += 1
            sample = body[1:2000]
        elif self._site_file.ascii_columns:
            names = list(self._site_file.ascii_columns)
            sample = body[:2000]
        else:
            names = ["x", "y", "z"] + [f"column_{i}" for i in range(4, len(first) + 1)]
            sample = body[:2000]
        if len(names) != len(set(names)):
            raise SourceError(f"{self.relpath}: repeated column names {names}; rename them in the site file [attributes]")
        missing = {"x", "y", "z"} - set(names)
        if missing:
            raise SourceError(
                f"{self.relpath}: no {', '.join(sorted(missing))} column among {names}; "
                "name the columns in the site file ([ascii] columns or [attributes] rename)"
            )
        self._names = names
        rows = [self._split(ln) for ln in sample]
        rows = [r for r in rows if len(r) == len(names)]
        self._integer = {n for i, n in enumerate(names) if rows and all(re.fullmatch(r"\s*[-+]?\d+\s*", r[i]) for r in rows)}
        self._integer -= {"x", "y", "z"}
        places = 0
        for r in rows:
            for i, n in enumerate(names):
                if n in ("x", "y", "z") and "." in r[i] and "e" not in r[i].lower():
                    places = max(places, len(r[i].strip().split(".")[1]))
        places = getattr(self._site_file, "ascii_places", None) or min(places, MAX_PLACES)
        axes = {a: AxisEncoding.for_text(places) for a in "xyz"}
        return SourceHeader(
            format="ascii",
            version={",": "csv", ";": "csv;", "\t": "tsv", "|": "psv", " ": "space"}[self._delimiter],
            crs_wkt=None,
            axes=axes,
            columns=tuple(n for n in names if n not in ("x", "y", "z")),
        )

    def _pick_delimiter(self, lines: list[str]) -> str:
        wanted = self._site_file.ascii_delimiter
        if wanted != "auto":
            return wanted
        best, best_score = " ", -1
        for d in _DELIMITERS:
            counts = [len(self._split(ln, d)) for ln in lines]
            common = max(set(counts), key=counts.count)
            score = counts.count(common) * (common > 1)
            if score > best_score:
                best, best_score = d, score
        return best

    def _split(self, line: str, delimiter: str | None = None) -> list[str]:
        d = delimiter or self._delimiter
        return line.split() if d == " " else line.split(d)

    def _stream(self):
        """The file as bytes pyarrow can parse: BOM dropped, runs of blanks folded for space-separated."""
        fh = self._opener()
        fh.seek(self._bom)
        if self._delimiter != " ":
            return fh
        return _FoldedBlanks(fh)

    def rows(self, chunk_size: int = 2_000_000, salvage: bool = False) -> Iterator[pa.Table]:
        return self.chunks(chunk_size, salvage)

    def chunks(self, chunk_size: int = 2_000_000, salvage: bool = False) -> Iterator[pa.Table]:
        bad_rows = 0

        def on_invalid(row) -> str:
            nonlocal bad_rows
            bad_rows += 1
            return "skip"

        read_options = pcsv.ReadOptions(
            skip_rows=self._skip, column_names=self._names, block_size=max(1 << 20, chunk_size * 48), use_threads=True
        )
        parse_options = pcsv.ParseOptions(
            delimiter=self._delimiter, invalid_row_handler=on_invalid, ignore_empty_lines=True
        )
        convert = pcsv.ConvertOptions(column_types={n: pa.string() for n in self._names}, strings_can_be_null=False)
        with self._stream() as fh:
            try:
                reader = pcsv.open_csv(fh, read_options=read_options, parse_options=parse_options, convert_options=convert)
            except (pa.ArrowInvalid, StopIteration) as exc:
                raise SourceError(f"{self.relpath}: cannot be parsed as delimited text ({exc})") from None
            while True:
                try:
                    batch = reader.read_next_batch()
                except StopIteration:
                    break
                except pa.ArrowInvalid as exc:
                    raise SourceError(f"{self.relpath}: text parsing failed ({exc}); check the delimiter in the site file") from None
                table, bad = self._convert(batch)
                bad_rows += bad
                if bad_rows and not salvage:
                    raise DamagedSource(
                        f"{self.relpath}: {bad_rows} malformed or non-numeric rows (NaN, text, wrong column count); "
                        "use --salvage to keep the good rows"
                    )
                self.tally.points += table.num_rows
                if table.num_rows:
                    yield table
        if bad_rows:
            self.tally.bad_rows = bad_rows
            self.tally.problems.append(f"{bad_rows} malformed or non-numeric rows skipped")

    def _check_range(self, name: str, text: pa.Array, values: np.ndarray, places: int) -> None:
        """Digits a float64 or a DECIMAL(18, places) cannot hold would be changed silently: refuse them."""
        if pc.any(pc.match_substring_regex(text, rf"\.\d{{{MAX_PLACES + 1},}}$")).as_py():
            raise SourceError(
                f"{self.relpath}: column {name} has values with more than {MAX_PLACES} decimals, "
                "more than a 64-bit float keeps; round them in the export"
            )
        too_big = np.abs(values) >= 10.0 ** (MAX_DIGITS - places)
        if too_big.any():
            raise SourceError(
                f"{self.relpath}: column {name} has values too large for 18 significant digits at {places} "
                f"decimals (e.g. {values[too_big][0]:g}); check the column layout or set [ascii] places lower"
            )

    def measure(self, chunk_size: int = 2_000_000) -> tuple[float, ...] | None:
        """Count and bounds of the readable rows (text has to be parsed to know them)."""
        from archive.sources.base import merge_bounds, table_bounds

        bounds = None
        for table in self.chunks(chunk_size, salvage=True):
            bounds = merge_bounds(bounds, table_bounds(table))
        return bounds

    def _convert(self, batch: pa.RecordBatch) -> tuple[pa.Table, int]:
        good = None
        for name in self._names:
            pattern = _FINITE_NUMBER if name in ("x", "y", "z") else _NUMBER
            ok = pc.match_substring_regex(batch.column(name), pattern)
            good = ok if good is None else pc.and_(good, ok)
        bad = len(batch) - pc.sum(good).as_py() if len(batch) else 0
        if bad:
            batch = batch.filter(good)
        columns: dict[str, pa.Array] = {}
        for name in self._names:
            text = pc.utf8_trim_whitespace(batch.column(name))
            if name in ("x", "y", "z"):
                values = pc.cast(text, pa.float64()).to_numpy(zero_copy_only=False)
                enc = self.header.axes[name]
                self._check_range(name, text, values, enc.places)
                columns[name], inexact = enc.from_float(values)
                if inexact.any():
                    raise SourceError(
                        f"{self.relpath}: column {name} has values with more than {enc.places} decimals "
                        "(the first rows had fewer); set [ascii] places in the site file"
                    )
            else:
                columns[name] = pc.cast(text, pa.int64() if name in self._integer else pa.float64())
        ordered = {a: columns[a] for a in ("x", "y", "z")}
        ordered.update({n: columns[n] for n in self._names if n not in ordered})
        return pa.table(ordered), bad


class _FoldedBlanks(io.RawIOBase):
    """Read-only stream that folds runs of blanks into one space, line by line."""

    def __init__(self, fh) -> None:
        self._fh = fh
        self._buffer = b""

    def readable(self) -> bool:
        return True

    def readinto(self, target) -> int:
        while not self._buffer:
            block = self._fh.read(1 << 20)
            if not block:
                return 0
            more = self._fh.readline()
            self._buffer = re.sub(rb"[ \t]+", b" ", re.sub(rb"^[ \t]+|[ \t]+$", b"", block + more, flags=re.M))
        n = min(len(target), len(self._buffer))
        target[:n] = self._buffer[:n]
        self._buffer = self._buffer[n:]
        return n

    def close(self) -> None:
        self._fh.close()
        super().close()
