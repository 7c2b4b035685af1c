"""The site file: an optional TOML file saying how to read one source archive.

Every field has a default that fits the common case, so most sources need no site file. Errors
name the site file and the field, because a typo here should never surface as a wrong scan
time three days into a migration.
"""

from __future__ import annotations

import functools
import json
import re
import tomllib
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import TYPE_CHECKING, Any
from zoneinfo import ZoneInfo, ZoneInfoNotFoundError

from archive.catalog.extensions import SCHEMA_DIR
from archive.frames import declares_no_crs

if TYPE_CHECKING:
    import jsonschema

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
    except (IsADirectoryError, PermissionError) as exc:
        raise SiteFileError(f"site file {path} cannot be read ({exc.strerror}); give a readable TOML file") from None
    except UnicodeDecodeError:
        raise SiteFileError(f"site file {path} is not UTF-8 text; save it as UTF-8 TOML") from None
    except tomllib.TOMLDecodeError as exc:
        raise SiteFileError(f"site file {path} is not valid TOML: {exc}") from None
    return parse_site_file(data, str(path)).with_crs(crs)


def parse_site_file(data: dict[str, Any], where: str = "<site_file>") -> SiteFile:
    """Check ``data`` against catalog_schema/site.schema.json (the one statement of what a site
    file may hold), then the few things a JSON Schema cannot say, then build the typed object."""
    def fail(field_name: str, why: str) -> SiteFileError:
        return SiteFileError(f"site file {where}: [{field_name}] {why}")

    errors = sorted(_validator().iter_errors(data), key=lambda e: (list(map(str, e.absolute_path)), e.validator))
    if errors:
        raise SiteFileError(f"site file {where}: " + "; ".join(dict.fromkeys(_explain(e) for e in errors[:5])))

    site = data.get("site", {})
    paths = data.get("paths", {})
    ascii_ = data.get("ascii", {})
    grids = data.get("grids", {})
    timezone = site.get("timezone", "UTC")
    try:
        ZoneInfo(timezone)
    except (ZoneInfoNotFoundError, ValueError):
        raise fail("site.timezone", f"{timezone!r} is not an IANA time zone such as 'UTC' or 'Europe/Oslo'") from None
    crs_fields = [("site.crs", site.get("crs"))]
    crs_fields += [(f"grids.files[{i}].crs", r.get("crs")) for i, r in enumerate(grids.get("files", []))]
    for name, text in crs_fields:
        if text is not None and not (name == "site.crs" and declares_no_crs(text)) and not _is_crs(text):
            raise fail(name, f"{text!r} is not a CRS pyproj knows; give e.g. 'EPSG:32633', WKT or PROJJSON")

    station_pattern = paths.get("station", DEFAULT_STATION)
    time_pattern = paths.get("time", DEFAULT_TIME)
    patterns = [("paths.station", station_pattern, "station"), ("paths.time", time_pattern, "time")]
    patterns += [(f"grids.files[{i}].pattern", r["pattern"], None) for i, r in enumerate(grids.get("files", []))]
    for name, pattern, group in patterns:
        try:
            compiled = re.compile(pattern)
        except re.error as exc:
            raise fail(name, f"{pattern!r} is not a regular expression: {exc}") from None
        if group and group not in compiled.groupindex:
            raise fail(name, f"needs a named group (?P<{group}>...)")

    for station, (xmin, ymin, xmax, ymax) in grids.get("extent", {}).items():
        if not (xmin < xmax and ymin < ymax):
            raise fail(f"grids.extent.{station}", f"{[xmin, ymin, xmax, ymax]} must be [xmin, ymin, xmax, ymax] "
                                                   "with xmin < xmax and ymin < ymax")

    times = []
    for pattern, value in data.get("times", {}).items():
        from archive.timeutil import parse_time

        try:
            parse_time(value if isinstance(value, str) else value.isoformat())
        except (ValueError, TypeError, AttributeError):
            raise fail(f"times.{pattern}", f"{value!r} is not a time such as \"2016-05-01T10:00:00Z\"") from None
        times.append((str(pattern), value if isinstance(value, str) else value.isoformat()))

    stations = tuple(
        StationRule(folder, rule["id"], tuple(map(float, rule["origin"])) if "origin" in rule else None)
        for folder, rule in data.get("stations", {}).items()
    )
    return SiteFile(
        times=tuple(times),
        crs=site.get("crs"),
        timezone=timezone,
        station_pattern=station_pattern,
        time_pattern=time_pattern,
        include=tuple(paths.get("include", ("**/*",))),
        exclude=tuple(paths.get("exclude", ("**/.*",))),
        stations=stations,
        ascii_delimiter=ascii_.get("delimiter", "auto"),
        ascii_columns=tuple(ascii_.get("columns", ())),
        ascii_comment=ascii_.get("comment", "#"),
        ascii_places=ascii_.get("places"),
        renames=tuple(data.get("attributes", {}).get("rename", {}).items()),
        grid_cell=float(grids.get("cell", 1.0)),
        grid_margin=float(grids.get("margin", 10.0)),
        grid_extents=tuple((station, tuple(map(float, ext))) for station, ext in grids.get("extent", {}).items()),
        grid_files=tuple(GridFileRule(r["pattern"], r.get("product"), r.get("crs"), r.get("station"))
                         for r in grids.get("files", [])),
        catalog=dict(data.get("catalog", {})),
        path=where,
    )


SCHEMA_PATH = SCHEMA_DIR / "site.schema.json"
_TYPES = {"array": "a list [...]", "object": "a table", "string": "a string in quotes", "number": "a number",
          "integer": "a whole number", "boolean": "true or false"}


@functools.cache
def _validator() -> jsonschema.Draft202012Validator:
    import jsonschema  # only when a site file is read; zero-config runs never load it

    return jsonschema.Draft202012Validator(json.loads(SCHEMA_PATH.read_text(encoding="utf-8")))


def _explain(error: jsonschema.ValidationError) -> str:
    """One schema violation as a user reads it: the field, its value, and what to write instead."""
    where = "".join(f"[{p}]" if isinstance(p, int) else f".{p}" for p in error.absolute_path).lstrip(".")
    field_name = f"[{where}]" if where else "top level"
    value = error.instance
    shown = repr(value) if len(repr(value)) <= 60 else repr(value)[:57] + "..."
    kind = error.validator
    if kind == "type":
        wanted = error.validator_value if isinstance(error.validator_value, list) else [error.validator_value]
        hint = f" ({error.schema['description']})" if "description" in error.schema else ""
        if "array" in wanted and isinstance(value, str):
            hint += f"; write it as a list, e.g. [{json.dumps(value)}]"
        return f"{field_name} is {shown}, must be {' or '.join(_TYPES.get(w, w) for w in wanted)}{hint}"
    if kind == "additionalProperties":
        allowed = sorted(error.schema.get("properties", {}))
        extra = sorted(set(value) - set(allowed)) if isinstance(value, dict) else []
        return (f"{field_name}: unknown field(s) {', '.join(map(repr, extra))}"
                + (f"; known: {', '.join(allowed)}" if allowed else ""))
    if kind == "required":
        return f"{field_name}: {error.message}"
    if kind == "const":
        return f"{field_name} is {shown}; this scanshelf reads version {error.validator_value}"
    if kind == "enum":
        return f"{field_name} is {shown}, must be one of {', '.join(map(repr, error.validator_value))}"
    if kind in ("minItems", "maxItems"):
        return f"{field_name} is {shown}, must hold {error.validator_value} values" if \
            error.schema.get("minItems") == error.schema.get("maxItems") else f"{field_name} is {shown}: {error.message}"
    bounds = {"exclusiveMinimum": "greater than", "minimum": "at least", "maximum": "at most"}
    if kind in bounds:
        return f"{field_name} is {shown}, must be {bounds[kind]} {error.validator_value}" + (
            f" ({error.schema['description']})" if "description" in error.schema else "")
    if kind == "pattern":
        return f"{field_name} is {shown}, does not match {error.validator_value!r}" + (
            f" ({error.schema['description']})" if "description" in error.schema else "")
    return f"{field_name} is {shown}: {error.message}"


def _is_crs(text: str) -> bool:
    from pyproj import CRS
    from pyproj.exceptions import CRSError

    try:
        CRS.from_user_input(text)
    except CRSError:
        return False
    return True
