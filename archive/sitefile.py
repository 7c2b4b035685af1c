"""The site file: an optional TOML file saying how to read one source archive.

Every field has a default that fits the common case, so most sources need no site file. Errors
name the site file and the field, because a typo here should never surface as a wrong scan
time three days into a migration.
"""

from __future__ import annotations

import re
import tomllib
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import Any
from zoneinfo import ZoneInfo, ZoneInfoNotFoundError

DEFAULT_STATION = r"^(?P<station>[^/]+)/"
DEFAULT_TIME = r"(?P<time>\d{8}[_T]\d{6})"


class SiteFileError(ValueError):
    """A site file that cannot be used; the message names the file and the field."""


@dataclass(frozen=True)
class StationRule:
    folder: str
    id: str
    origin: tuple[float, float, float] | None = None


@dataclass(frozen=True)
class GridFileRule:
    pattern: str
    product: str | None = None
    crs: str | None = None
    station: str | None = None


@dataclass(frozen=True)
class SiteFile:
    """How to read a source. Frozen so it can travel to dask workers unchanged."""

    crs: str | None = None
    timezone: str = "UTC"
    station_pattern: str = DEFAULT_STATION
    time_pattern: str = DEFAULT_TIME
    include: tuple[str, ...] = ("**/*",)
    exclude: tuple[str, ...] = ("**/.*",)
    stations: tuple[StationRule, ...] = ()
    ascii_delimiter: str = "auto"
    ascii_columns: tuple[str, ...] = ()
    ascii_comment: str = "#"
    ascii_places: int | None = None  # decimals of x, y, z; default: as many as the first rows show
    renames: tuple[tuple[str, str], ...] = ()
    grid_cell: float = 1.0
    grid_margin: float = 10.0
    grid_extents: tuple[tuple[str, tuple[float, float, float, float]], ...] = ()
    grid_files: tuple[GridFileRule, ...] = ()
    catalog: dict[str, Any] = field(default_factory=dict, hash=False, compare=False)
    times: tuple[tuple[str, str], ...] = ()  # [times]: path glob → ISO time, the last resort for a scan's time
    path: str | None = None  # where it was loaded from, for messages

    @property
    def zone(self) -> ZoneInfo:
        return ZoneInfo(self.timezone)

    def station_rule(self, folder: str) -> StationRule | None:
        return next((s for s in self.stations if s.folder == folder), None)

    def station_origin(self, station: str) -> tuple[float, float, float] | None:
        rule = next((s for s in self.stations if s.id == station), None)
        return rule.origin if rule else None

    def rename(self, name: str) -> str:
        return dict(self.renames).get(name, name)

    def grid_extent(self, station: str) -> tuple[float, float, float, float] | None:
        return dict(self.grid_extents).get(station)

    def grid_rule(self, relpath: str) -> GridFileRule | None:
        return next((r for r in self.grid_files if re.search(r.pattern, relpath)), None)

    def time_of(self, relpath: str):
        """The [times] entry whose glob matches ``relpath`` (naive times are in the site's zone), or None."""
        import fnmatch

        from archive.timeutil import parse_time

        for pattern, value in self.times:
            if fnmatch.fnmatchcase(relpath, pattern):
                return parse_time(value, self.zone)
        return None

    def with_crs(self, crs: str | None) -> "SiteFile":
        """A command-line --crs overrides the site file's site CRS."""
        return self if crs is None else replace(self, crs=crs)


def load_site_file(path: str | Path | None, crs: str | None = None) -> SiteFile:
    """Read a site file (or the defaults when ``path`` is None); ``crs`` overrides [site].crs."""
    if path is None:
        return SiteFile().with_crs(crs)
    path = Path(path)
    try:
        data = tomllib.loads(path.read_text(encoding="utf-8"))
    except FileNotFoundError:
        raise SiteFileError(f"site file {path} does not exist; check the --site path") from None
    except tomllib.TOMLDecodeError as exc:
        raise SiteFileError(f"site file {path} is not valid TOML: {exc}") from None
    return parse_site_file(data, str(path)).with_crs(crs)


def parse_site_file(data: dict[str, Any], where: str = "<site_file>") -> SiteFile:
    def fail(field_name: str, why: str) -> SiteFileError:
        return SiteFileError(f"site file {where}: [{field_name}] {why}")

    known = {"version", "site", "paths", "stations", "ascii", "attributes", "grids", "catalog", "times"}
    unknown = set(data) - known
    if unknown:
        raise fail(", ".join(sorted(unknown)), f"is not a site file section; known: {', '.join(sorted(known))}")
    if data.get("version", 1) != 1:
        raise fail("version", f"is {data['version']!r}; this scanshelf reads version 1")

    site = _table(data, "site", fail)
    paths = _table(data, "paths", fail)
    ascii_ = _table(data, "ascii", fail)
    grids = _table(data, "grids", fail)
    timezone = str(site.get("timezone", "UTC"))
    try:
        ZoneInfo(timezone)
    except (ZoneInfoNotFoundError, ValueError):
        raise fail("site.timezone", f"{timezone!r} is not an IANA time zone such as 'UTC' or 'Europe/Oslo'") from None

    station_pattern = str(paths.get("station", DEFAULT_STATION))
    time_pattern = str(paths.get("time", DEFAULT_TIME))
    for name, pattern, group in (("paths.station", station_pattern, "station"), ("paths.time", time_pattern, "time")):
        try:
            compiled = re.compile(pattern)
        except re.error as exc:
            raise fail(name, f"is not a regular expression: {exc}") from None
        if group not in compiled.groupindex:
            raise fail(name, f"needs a named group (?P<{group}>...)")

    stations = []
    for folder, rule in _table(data, "stations", fail).items():
        if not isinstance(rule, dict) or "id" not in rule:
            raise fail(f"stations.{folder}", "needs an id = \"...\"")
        origin = rule.get("origin")
        if origin is not None and (len(origin) != 3 or not all(isinstance(v, (int, float)) for v in origin)):
            raise fail(f"stations.{folder}.origin", "must be three numbers [x, y, z]")
        stations.append(StationRule(folder, str(rule["id"]), tuple(map(float, origin)) if origin else None))

    delimiter = str(ascii_.get("delimiter", "auto"))
    if delimiter not in {"auto", ",", ";", " ", "\t", "|"}:
        raise fail("ascii.delimiter", f"{delimiter!r} is not one of auto , ; space tab |")

    extents = []
    for station, ext in dict(grids.get("extent", {})).items():
        if len(ext) != 4:
            raise fail(f"grids.extent.{station}", "must be [xmin, ymin, xmax, ymax]")
        extents.append((station, tuple(map(float, ext))))
    grid_files = []
    for i, rule in enumerate(grids.get("files", [])):
        if "pattern" not in rule:
            raise fail(f"grids.files[{i}]", "needs a pattern = '...'")
        grid_files.append(GridFileRule(str(rule["pattern"]), rule.get("product"), rule.get("crs"), rule.get("station")))
    cell = float(grids.get("cell", 1.0))
    if cell <= 0:
        raise fail("grids.cell", "must be a positive number of metres")

    times = []
    for pattern, value in _table(data, "times", fail).items():
        from archive.timeutil import parse_time

        try:
            parse_time(value if isinstance(value, str) else value.isoformat())
        except (ValueError, TypeError, AttributeError):
            raise fail(f"times.{pattern}", f"{value!r} is not a time such as \"2016-05-01T10:00:00Z\"") from None
        times.append((str(pattern), value if isinstance(value, str) else value.isoformat()))

    return SiteFile(
        times=tuple(times),
        crs=site.get("crs"),
        timezone=timezone,
        station_pattern=station_pattern,
        time_pattern=time_pattern,
        include=tuple(paths.get("include", ("**/*",))),
        exclude=tuple(paths.get("exclude", ("**/.*",))),
        stations=tuple(stations),
        ascii_delimiter=delimiter,
        ascii_columns=tuple(ascii_.get("columns", ())),
        ascii_comment=str(ascii_.get("comment", "#")),
        ascii_places=int(ascii_["places"]) if "places" in ascii_ else None,
        renames=tuple(dict(_table(data, "attributes", fail).get("rename", {})).items()),
        grid_cell=cell,
        grid_margin=float(grids.get("margin", 10.0)),
        grid_extents=tuple(extents),
        grid_files=tuple(grid_files),
        catalog=dict(_table(data, "catalog", fail)),
        path=where,
    )


def _table(data: dict[str, Any], name: str, fail) -> dict[str, Any]:
    value = data.get(name, {})
    if not isinstance(value, dict):
        raise fail(name, "must be a table")
    return value
