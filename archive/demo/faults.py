"""Planting the faults real archives hold, each with an exact expectation for the truth file.

Byte offsets of LAS header fields follow the ASPRS LAS 1.2 / 1.4 specifications (public
header block): legacy point count at 107 (uint32), legacy points by return at 111
(5 x uint32); LAS 1.4 point count at 247 (uint64), points by return at 255 (15 x uint64).
"""

from __future__ import annotations

import os
import shutil
import struct
from dataclasses import dataclass
from pathlib import Path

import laspy
import numpy as np
import pyarrow as pa

from archive.demo.writers import atomic


def truncate_las(path: Path, keep: int) -> dict:
    """Cut a LAS file in the middle of point record ``keep`` (as a copy interrupted midway)."""
    with laspy.open(path) as reader:
        header = reader.header
        start, size, claimed = header.offset_to_point_data, header.point_format.size, header.point_count
    cut = start + keep * size + size // 2
    os.truncate(path, cut)
    return {
        "kind": "truncated",
        "expect": f"file ends inside point record {keep}: header claims {claimed} points, "
        f"only {keep} complete records follow the header",
        "header_point_count": claimed,
        "complete_records": keep,
        "file_size": cut,
        "recoverable_points": keep,
    }


def overstate_count(path: Path, extra: int) -> dict:
    """Make the header claim ``extra`` more points than the file stores (whole records)."""
    with laspy.open(path) as reader:
        stored = reader.header.point_count
        minor = reader.header.version.minor
    claimed = stored + extra
    with open(path, "r+b") as f:
        f.seek(107)
        legacy = struct.unpack("<6I", f.read(24))
        if legacy[0]:  # legacy fields stay 0 for LAS 1.4 point formats 6-10
            f.seek(107)
            f.write(struct.pack("<6I", claimed, legacy[1] + extra, *legacy[2:]))
        if minor >= 4:
            f.seek(247)
            f.write(struct.pack("<Q", claimed))
            f.seek(255)
            first = struct.unpack("<Q", f.read(8))[0]
            f.seek(255)
            f.write(struct.pack("<Q", first + extra))
    return {
        "kind": "count_mismatch",
        "expect": f"header claims {claimed} points, the file stores {stored} whole records",
        "header_point_count": claimed,
        "stored_points": stored,
        "recoverable_points": stored,
    }


def duplicate(original: Path, copy: Path) -> None:
    """A byte-identical copy of a scan under another name (a forgotten backup)."""
    with atomic(copy) as tmp:
        shutil.copyfile(original, tmp)


@dataclass(frozen=True)
class AsciiSpoiler:
    """Damages chosen rows of an ASCII export: NaN values and malformed lines."""

    n_rows: int
    delimiter: str

    @property
    def plan(self) -> dict[int, str]:
        """Row index → damage, spread over the file at fixed fractions."""
        kinds = {0.11: "nan", 0.37: "NaN-z", 0.63: "nan", 0.23: "few-columns", 0.51: "not-a-number", 0.82: "extra-column"}
        plan: dict[int, str] = {}
        for frac, kind in sorted(kinds.items()):
            row = int(frac * self.n_rows)
            while row in plan:
                row += 1
            if row < self.n_rows:
                plan[row] = kind
        return plan

    def __call__(self, first_row: int, lines: pa.Array) -> tuple[pa.Array, np.ndarray]:
        keep = np.ones(len(lines), bool)
        hits = {r - first_row: k for r, k in self.plan.items() if first_row <= r < first_row + len(lines)}
        if not hits:
            return lines, keep
        text = lines.to_pylist()
        d = self.delimiter
        for i, kind in hits.items():
            fields = text[i].split(d)
            if kind == "nan":
                fields[0] = fields[1] = "nan"
            elif kind == "NaN-z":
                fields[2] = "NaN"
            elif kind == "few-columns":
                fields = fields[:3]
            elif kind == "not-a-number":
                fields[2] = "ERR"
            else:
                fields.append("0")
            text[i] = d.join(fields)
            keep[i] = False
        return pa.array(text, pa.string()), keep

    def truth(self) -> dict:
        plan = self.plan
        nan_rows = sorted(r for r, k in plan.items() if k in ("nan", "NaN-z"))
        bad_rows = sorted(r for r, k in plan.items() if k not in ("nan", "NaN-z"))
        return {
            "kind": "bad_rows",
            "expect": f"{len(nan_rows)} rows hold NaN coordinates and {len(bad_rows)} rows are "
            "malformed (too few columns, a non-numeric value, an extra column); the rest are good",
            # data row indices count from 0 after the header line
            "nan_rows": nan_rows,
            "malformed_rows": bad_rows,
            "rows": self.n_rows,
            "recoverable_points": self.n_rows - len(plan),
        }
