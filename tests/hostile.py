"""A corpus of hostile and broken source files, crafted byte by byte by the tests themselves.

Byte offsets of LAS header fields follow the ASPRS LAS 1.2 / 1.4 specifications (public header
block): version minor at 25 (uint8), header size at 94 (uint16), offset to point data at 96
(uint32), number of VLRs at 100 (uint32), point format at 104 (uint8), record length at 105
(uint16), legacy point count at 107 (uint32), x/y/z scale at 131/139/147 and offset at
155/163/171 (float64), LAS 1.4 point count at 247 (uint64). A VLR header is 54 bytes: reserved
(2), user id (16), record id (2), record length after header (2, at +20), description (32).

Every case says what a run must do with the file: ``refused`` (not converted; the reason matches
``cause``), ``converted`` (all points kept), or ``ignored`` (not a point file). Refusals and
ignores must never stop the rest of the run.
"""

from __future__ import annotations

import os
import struct
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from tests import factory

POINTS = 1500  # points per crafted LAS: small, the faults are in the bytes around them


@dataclass(frozen=True)
class Case:
    relpath: str
    expect: str  # refused | converted | ignored
    cause: str = ""  # regular expression the recorded reason must match (case-insensitive)
    points: int | None = None  # for converted cases


def _patch(path: Path, offset: int, fmt: str, value) -> None:
    data = bytearray(path.read_bytes())
    struct.pack_into("<" + fmt, data, offset, value)
    path.write_bytes(bytes(data))


class _Times:
    """A distinct scan time per file: two files of one station at one time would be refused for that."""

    def __init__(self) -> None:
        self.hour = 0

    def __call__(self):
        self.hour += 1
        return factory.utc(2026, 10, 1 + self.hour // 24, self.hour % 24)


def _las(root: Path, rel: str, when, n: int = POINTS, **kw) -> Path:
    path = root / rel
    factory.write_las(path, n, when, seed=len(rel), **kw)
    return path


def las_cases(root: Path) -> list[Case]:
    t = _Times()
    cases = []

    def las(rel: str, **kw) -> Path:
        return _las(root, rel, t(), **kw)

    p = las("north/count_huge_14.las")
    _patch(p, 247, "Q", 2**62)
    cases.append(Case("north/count_huge_14.las", "refused", r"declares 4611686018427387904 points"))

    p = las("north/count_huge_12.las", version="1.2", point_format=1, extra=False)
    _patch(p, 107, "I", 2**32 - 1)
    cases.append(Case("north/count_huge_12.las", "refused", r"declares 4294967295 points|no scan time"))

    p = las("north/offset_beyond_end.las")
    _patch(p, 96, "I", 2**31)
    cases.append(Case("north/offset_beyond_end.las", "refused", r"declares 1500 points but the file holds 0"))

    p = las("north/offset_inside_header.las")
    _patch(p, 96, "I", 10)
    cases.append(Case("north/offset_inside_header.las", "refused", r"point data offset \(10\) lies inside the 375-byte header"))

    p = las("north/vlr_count_huge.las")
    _patch(p, 100, "I", 2**31 - 1)
    cases.append(Case("north/vlr_count_huge.las", "refused", r"declares 2147483647 VLRs"))

    p = las("north/vlr_length_absurd.las")
    header_size = struct.unpack_from("<H", p.read_bytes(), 94)[0]
    _patch(p, header_size + 20, "H", 65535)
    cases.append(Case("north/vlr_length_absurd.las", "refused", r"VLR 0 \(LASF_Spec\) runs \d+ bytes into the point data"))

    for rel, off, value, cause in (
        ("north/scale_zero.las", 131, 0.0, r"x scale in the header is 0.0, not a positive number"),
        ("north/scale_nan.las", 139, float("nan"), r"y scale in the header is nan"),
        ("north/scale_huge.las", 147, 1e300, r"z scale 1e\+300 .* beyond 1e\+15 in size"),
        ("north/offset_huge.las", 155, 1e300, r"offset 1e\+300 give coordinates beyond 1e\+15 in size"),
        ("north/offset_inf.las", 163, float("inf"), r"y offset in the header is inf"),
    ):
        _patch(las(rel), off, "d", value)
        cases.append(Case(rel, "refused", cause))

    las("north/zero_points.las", n=0)
    cases.append(Case("north/zero_points.las", "refused", r"file declares zero points"))

    p = las("north/header_size_huge.las")
    _patch(p, 94, "H", 65535)
    cases.append(Case("north/header_size_huge.las", "refused", r"lies inside the 65535-byte header"))

    p = las("north/record_length_zero.las")
    _patch(p, 105, "H", 0)
    cases.append(Case("north/record_length_zero.las", "refused", r"not a readable LAS/LAZ header \(Incoherent point size"))

    p = las("north/point_format_99.las")
    _patch(p, 104, "B", 99)
    cases.append(Case("north/point_format_99.las", "refused", r"not a readable LAS/LAZ header"))

    p = las("north/version_1_9.las")
    _patch(p, 25, "B", 9)
    cases.append(Case("north/version_1_9.las", "refused", r"not a readable LAS/LAZ header"))

    p = las("north/declared_beyond_real.las")
    data = p.read_bytes()
    p.write_bytes(data[: len(data) - 30 * 500 - 11])  # cut inside a record, 500 points short
    cases.append(Case("north/declared_beyond_real.las", "refused", r"declares 1500 points but the file holds \d+ \(truncated"))

    (root / "north/signature_only.las").write_bytes(b"LASF" + bytes(40))
    cases.append(Case("north/signature_only.las", "refused", r"not a readable LAS/LAZ header"))

    p = las("north/laz_garbage.laz")
    data = bytearray(p.read_bytes())
    mid = len(data) // 2
    data[mid : mid + 2000] = np.random.default_rng(7).integers(0, 256, 2000, dtype=np.uint8).tobytes()
    p.write_bytes(bytes(data))
    cases.append(Case("north/laz_garbage.laz", "refused", r"points unreadable after 0 of 1500"))
    return cases


def _csv(path: Path, rows: list[str], header: str = "X,Y,Z,Intensity", encoding: str = "utf-8", bom: bytes = b"") -> None:
    path.parent.mkdir(parents=True, exist_ok=True)
    text = "\n".join([header, *rows]) + "\n" if header else "\n".join(rows) + "\n"
    path.write_bytes(bom + text.encode(encoding))


def _rows(n: int, seed: int, sep: str = ",") -> list[str]:
    p = factory.scan_points(n, seed)
    return [f"{p['x'][i]:.3f}{sep}{p['y'][i]:.3f}{sep}{p['z'][i]:.3f}{sep}{p['intensity'][i]}" for i in range(n)]


def ascii_cases(root: Path) -> list[Case]:
    cases = []
    d = root / "south"

    rows = _rows(400, 1)
    rows = [r.replace(",", ";") if i % 7 == 3 else r for i, r in enumerate(rows)]
    _csv(d / "mixed 20261101T010000.csv", rows)
    cases.append(Case("south/mixed 20261101T010000.csv", "refused", r"57 malformed or non-numeric rows"))

    _csv(d / "bom 20261101T020000.csv", _rows(300, 2), bom=b"\xef\xbb\xbf")
    cases.append(Case("south/bom 20261101T020000.csv", "converted", points=300))

    _csv(d / "utf16 20261101T030000.csv", _rows(300, 3), encoding="utf-16-le", bom=b"\xff\xfe")
    cases.append(Case("south/utf16 20261101T030000.csv", "ignored", r"not a point or grid file"))

    rows = _rows(300, 4)
    rows[10] = "nan,7650100.000,50.000,10"
    rows[20] = "500100.000,inf,50.000,10"
    rows[30] = "500100.000,7650100.000,-Infinity,10"
    _csv(d / "nan_inf 20261101T040000.csv", rows)
    cases.append(Case("south/nan_inf 20261101T040000.csv", "refused", r"3 malformed or non-numeric rows"))

    _csv(d / "all_nan 20261101T050000.csv", ["nan,nan,nan,1"] * 50)
    cases.append(Case("south/all_nan 20261101T050000.csv", "ignored", r"not a point or grid file"))

    cols = 4000
    header = ",".join(["X", "Y", "Z"] + [f"c{i}" for i in range(cols - 3)])
    base = _rows(20, 6)
    _csv(d / "wide 20261101T060000.csv", [r.rsplit(",", 1)[0] + "," + ",".join(["1"] * (cols - 3)) for r in base], header=header)
    cases.append(Case("south/wide 20261101T060000.csv", "converted", points=20))

    rows = _rows(300, 7)
    rows.insert(150, "1" * (4 << 20))  # one 4 MiB line
    _csv(d / "long_line 20261101T070000.csv", rows)
    cases.append(Case("south/long_line 20261101T070000.csv", "refused", r"1 malformed or non-numeric rows"))

    _csv(d / "header_only 20261101T080000.csv", [])
    cases.append(Case("south/header_only 20261101T080000.csv", "ignored", r"not a point or grid file"))

    (d / "garbage 20261101T090000.xyz").write_bytes(bytes(np.random.default_rng(9).integers(0, 256, 50_000, dtype=np.uint8)))
    cases.append(Case("south/garbage 20261101T090000.xyz", "ignored", r"not a point or grid file"))

    rows = _rows(100, 10)
    rows[5] = "1e300,7650100.000,50.000,10"
    _csv(d / "huge_value 20261101T100000.csv", rows)
    cases.append(Case("south/huge_value 20261101T100000.csv", "refused", r"column x has values too large for 18 significant digits"))

    rows = _rows(100, 11)
    rows[50] = "500100.123456789012,7650100.000,50.000,10"
    _csv(d / "many_places 20261101T110000.csv", rows)
    cases.append(Case("south/many_places 20261101T110000.csv", "refused", r"column x has values with more than 9 decimals"))

    rows = [r + "  \r" for r in _rows(200, 12)]
    _csv(d / "crlf 20261101T120000.csv", rows)
    cases.append(Case("south/crlf 20261101T120000.csv", "converted", points=200))
    return cases


def name_cases(root: Path) -> list[Case]:
    """Good files under hostile names: they must convert like any other."""
    t = _Times()
    t.hour = 200
    cases = []
    for rel in (
        "north/scan with  spaces.las",
        "north/skänné ü 日本.las",
        "north/$(touch pwned);`id`&|>x'\"q.las",
        "north/-rf --help.las",
        "north/new\nline.las",
        "st átion;$x/scan.las",
    ):
        _las(root, rel, t())
        cases.append(Case(rel, "converted", points=POINTS))
    return cases


def link_cases(root: Path) -> list[Case]:
    """Symlink loops and dangling links: the walk must end and the other files go on."""
    (root / "north").mkdir(parents=True, exist_ok=True)
    os.symlink("..", root / "north/loop")
    os.symlink("self", root / "north/self")
    os.symlink("nothing-here.las", root / "north/dangling.las")
    return [
        Case("north/loop", "refused", r"cannot be read \(.*Is a directory"),
        Case("north/self", "refused", r"cannot be read \(.*Too many levels of symbolic links"),
        Case("north/dangling.las", "refused", r"cannot be read \(.*No such file"),
    ]


def build(root: Path) -> list[Case]:
    """Write the whole corpus under ``root``; returns what a run must do with each file."""
    return las_cases(root) + ascii_cases(root) + name_cases(root) + link_cases(root)
