"""Every value a user types, checked once at the edge: a bad one is a usage error (exit 2) whose
message names the option, the value and what to write instead, never a traceback further in."""

from __future__ import annotations

import json
import math
from typing import Any

import click

from archive.frames import declares_no_crs

KEY_VALUE = "KEY=VALUE"


class CrsType(click.ParamType):
    """A CRS pyproj understands; kept as the user's text (it travels to workers and into messages)."""

    name = "CRS"

    def __init__(self, local_frame: bool = False) -> None:
        self.local_frame = local_frame  # also accept "none": scans in a local frame (archive.frames)

    def convert(self, value: Any, param: click.Parameter | None, ctx: click.Context | None) -> str:
        from pyproj import CRS
        from pyproj.exceptions import CRSError

        if self.local_frame and declares_no_crs(str(value)):
            return str(value)
        try:
            CRS.from_user_input(value)
        except CRSError:
            self.fail(f"{value!r} is not a CRS pyproj knows; give e.g. EPSG:32633, a WKT string or PROJJSON text",
                      param, ctx)
        return str(value)


class PositiveType(click.ParamType):
    """A finite number above zero (cell sizes, fractions): 0, negatives, nan and inf are refused."""

    name = "NUMBER"

    def __init__(self, what: str, upper: float | None = None) -> None:
        self.what, self.upper = what, upper

    def convert(self, value: Any, param: click.Parameter | None, ctx: click.Context | None) -> float:
        try:
            number = float(value)
        except (TypeError, ValueError):
            self.fail(f"{value!r} is not a number; give {self.what}", param, ctx)
        if not math.isfinite(number) or number <= 0 or (self.upper is not None and number > self.upper):
            limit = f"above 0 and at most {self.upper:g}" if self.upper is not None else "above 0"
            self.fail(f"{value!r} must be a finite number {limit}: {self.what}", param, ctx)
        return number


class TimeType(click.ParamType):
    """An ISO 8601 time (no zone = UTC; a date alone is the whole day), kept as text."""

    name = "TIME"

    def convert(self, value: Any, param: click.Parameter | None, ctx: click.Context | None) -> str:
        from archive.query.shelf import as_utc

        try:
            as_utc(str(value))
        except (ValueError, TypeError, OverflowError):
            self.fail(f"{value!r} is not an ISO 8601 time; give e.g. 2026-10-01 or 2026-10-01T06:00:00Z", param, ctx)
        return str(value)


class KeyValueType(click.ParamType):
    """``key=value``; values that parse as JSON (numbers, true/false, null) are converted."""

    name = KEY_VALUE

    def convert(self, value: Any, param: click.Parameter | None, ctx: click.Context | None) -> tuple[str, Any]:
        if isinstance(value, tuple):
            return value
        key, sep, text = str(value).partition("=")
        if not sep or not key.strip() or key != key.strip():
            self.fail(f"{value!r} is not KEY=VALUE; give e.g. endpoint_url=http://127.0.0.1:9000 or anon=true",
                      param, ctx)
        try:
            return key, json.loads(text)
        except json.JSONDecodeError:
            return key, text


class UrlType(click.ParamType):
    """A local path or an fsspec URL whose protocol is installed (``s3://`` needs s3fs, ...)."""

    name = "URL"

    def convert(self, value: Any, param: click.Parameter | None, ctx: click.Context | None) -> str:
        import fsspec
        from fsspec.core import split_protocol

        text = str(value)
        if not text.strip():
            self.fail("is empty; give a folder or a URL such as s3://bucket/shelf", param, ctx)
        if "\0" in text:
            self.fail(f"{text!r} holds a NUL character; give a folder or a URL", param, ctx)
        protocol, _ = split_protocol(text)
        if protocol is not None and len(protocol) > 1:  # one letter: a Windows drive
            try:
                fsspec.get_filesystem_class(protocol)
            except ValueError:
                self.fail(f"{text!r}: no file system for {protocol}://; give a folder, file://, s3://, gs://, az:// "
                          "or https://", param, ctx)
            except ImportError as exc:
                self.fail(f"{text!r}: {protocol}:// needs a package that is not installed ({exc}); "
                          f"install it, e.g. pip install 'scanshelf[s3]' for s3://", param, ctx)
        return text


def check_bbox(ctx: click.Context, param: click.Parameter, value: tuple[float, ...] | None) -> tuple[float, ...] | None:
    """``--bbox XMIN YMIN XMAX YMAX``: four finite numbers with min < max."""
    if value is None or value == ():
        return None
    if not all(math.isfinite(v) for v in value):
        raise click.BadParameter(f"{' '.join(map(str, value))}: every value must be a finite number", ctx, param)
    xmin, ymin, xmax, ymax = value
    if not (xmin < xmax and ymin < ymax):
        raise click.BadParameter(
            f"{xmin:g} {ymin:g} {xmax:g} {ymax:g} is not XMIN YMIN XMAX YMAX with XMIN < XMAX and YMIN < YMAX",
            ctx, param)
    return value


def check_window(start: str | None, end: str | None) -> None:
    """--start after --end can match nothing: say so instead of printing an empty answer."""
    from archive.query.shelf import as_utc

    if start is not None and end is not None and as_utc(start) > as_utc(end, end=True):
        raise click.UsageError(f"--start {start} is later than --end {end}; swap them")


def storage_options(pairs: tuple[tuple[str, Any], ...], url: str | None = None,
                    hint: str = "-s/--storage-option") -> dict[str, Any]:
    """The parsed pairs as a dict; with ``url``, also check that its file system accepts them."""
    options = dict(pairs)
    if url is not None and options:
        from archive.storage import filesystem

        try:
            filesystem(url, options)
        except (TypeError, ValueError) as exc:
            raise click.BadParameter(f"{', '.join(options)} not accepted for {url}: {exc}", param_hint=hint) from None
    return options


CRS = CrsType()
CRS_OR_NONE = CrsType(local_frame=True)
TIME = TimeType()
KEY_VALUE_PAIR = KeyValueType()
URL = UrlType()


class BytesType(click.ParamType):
    """A memory size such as 1.5GiB or 800MB (dask's notation), at least 64 MiB."""

    name = "SIZE"

    def convert(self, value: Any, param: click.Parameter | None, ctx: click.Context | None) -> int:
        if isinstance(value, int):
            return value
        from dask.utils import parse_bytes  # dask only for a size the user typed

        try:
            size = parse_bytes(str(value))
        except (ValueError, TypeError):
            self.fail(f"{value!r} is not a memory size; give e.g. 1.5GiB or 800MB", param, ctx)
        if size < 64 * 2**20:
            self.fail(f"{value!r} is less than 64MiB, too little to sort a scan; give e.g. 1.5GiB", param, ctx)
        return size


def check_scheduler(ctx: click.Context, param: click.Parameter, value: str | None) -> str | None:
    """A dask scheduler address: [tcp|tls|inproc|ucx]://host:port or host:port."""
    import re

    if value is not None and not re.fullmatch(r"((tcp|tls|ucx)://)?[A-Za-z0-9.\-\[\]:]+:\d{1,5}", value):
        raise click.BadParameter(f"{value!r} is not a scheduler address; give e.g. tcp://10.0.0.5:8786", ctx, param)
    return value


BYTES = BytesType()


class FiniteRange(click.FloatRange):
    """click's FloatRange, which lets nan through (every comparison with nan is false)."""

    def convert(self, value: Any, param: click.Parameter | None, ctx: click.Context | None) -> float:
        number = super().convert(value, param, ctx)
        if not math.isfinite(number):
            self.fail(f"{value!r} is not a finite number", param, ctx)
        return number


class StationType(click.ParamType):
    """A station id as the shelf writes it: a letter or digit, then letters, digits, '_' and '.'."""

    name = "ID"

    def convert(self, value: Any, param: click.Parameter | None, ctx: click.Context | None) -> str:
        import re

        if not re.fullmatch(r"[A-Za-z0-9][A-Za-z0-9_.]*", str(value)):
            self.fail(f"{value!r} is not a station id (letters, digits, '_' and '.'); "
                      "`scanshelf find SHELF` lists the stations", param, ctx)
        return str(value)


class OutputFile(click.ParamType):
    """A file to write: one of ``suffixes``, not an existing folder, no file standing where a folder must be."""

    name = "FILE"

    def __init__(self, *suffixes: str) -> None:
        self.suffixes = suffixes

    def convert(self, value: Any, param: click.Parameter | None, ctx: click.Context | None) -> str:
        import os

        text = URL.convert(value, param, ctx)
        if not text.lower().endswith(self.suffixes):
            self.fail(f"{text!r} must end in {', '.join(self.suffixes)}", param, ctx)
        if "://" not in text or text.startswith("file://"):
            path = os.path.abspath(text.removeprefix("file://"))
            if os.path.isdir(path) and not path.endswith(".zarr"):
                self.fail(f"{text!r} is a folder; give a file name, e.g. {os.path.join(text, 'out' + self.suffixes[0])}",
                          param, ctx)
            parent = os.path.dirname(path)
            while parent and not os.path.exists(parent):
                parent = os.path.dirname(parent)
            if parent and not os.path.isdir(parent):
                self.fail(f"{text!r}: {parent} is a file, not a folder; choose another path", param, ctx)
        return text


STATION = StationType()
