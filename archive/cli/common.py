"""Shared pieces of the command line: option parsing helpers and error presentation."""

from __future__ import annotations

import contextlib
import functools
import json
import sys
from typing import Any, Callable, Iterator

import click

from archive.sitefile import SiteFileError


@contextlib.contextmanager
def fail_cleanly() -> Iterator[None]:
    """Known errors become one readable line and exit code 2, not a traceback."""
    try:
        yield
    except (SiteFileError, FileNotFoundError, ValueError) as exc:
        click.echo(f"scanshelf: error: {exc}", err=True)
        sys.exit(2)


def parse_storage_options(pairs: tuple[str, ...]) -> dict[str, Any]:
    """``key=value`` pairs → a dict; values that parse as JSON (numbers, true/false) are converted."""
    options: dict[str, Any] = {}
    for pair in pairs:
        key, sep, value = pair.partition("=")
        if not sep or not key:
            raise click.BadParameter(f"{pair!r} is not key=value", param_hint="--storage-option")
        try:
            options[key] = json.loads(value)
        except json.JSONDecodeError:
            options[key] = value
    return options


storage_option = click.option(
    "--storage-option", "storage_options", multiple=True, metavar="KEY=VALUE",
    help="fsspec storage option (repeatable), e.g. endpoint_url=http://127.0.0.1:9000 or anon=true. "
         "Credentials are best left to the environment.",
)
def site_option(command: Callable[..., Any]) -> Callable[..., Any]:
    """``--site FILE`` (passed on as ``site_file``); the old spelling ``--recipe`` still works for one
    release, hidden from --help, with a deprecation warning."""

    @functools.wraps(command)
    def accept_old_spelling(*args: Any, recipe: str | None = None, **kwargs: Any) -> Any:
        if recipe is not None:
            click.echo("scanshelf: warning: --recipe is deprecated and will be removed; "
                       "use --site FILE (the same TOML file)", err=True)
            kwargs["site_file"] = kwargs.get("site_file") or recipe
        return command(*args, **kwargs)

    path = click.Path(exists=True, dir_okay=False)
    accept_old_spelling = click.option("--recipe", "recipe", type=path, hidden=True)(accept_old_spelling)
    return click.option("--site", "site_file", type=path, metavar="FILE",
                        help="Site file (TOML) that says how to read this source: station and time patterns, "
                             "CRS, ASCII columns, grids, catalog fields. See examples/site.toml.")(accept_old_spelling)


crs_option = click.option("--crs", help="CRS for files that declare none, e.g. EPSG:32633, or `none` for scans in a local frame with no CRS (overrides the site file).")
quiet_option = click.option("-q", "--quiet", is_flag=True, help="No progress bars.")
json_option = click.option("--json", "as_json", is_flag=True, help="Print the result as JSON (for scripts); no progress bars.")
