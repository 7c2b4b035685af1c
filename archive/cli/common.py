"""Shared pieces of the command line: option parsing helpers and error presentation."""

from __future__ import annotations

import contextlib
import functools
import logging
import sys
from typing import Any, Callable, Iterator

import click

from archive.cli import params
from archive.sitefile import SiteFileError


@contextlib.contextmanager
def fail_cleanly() -> Iterator[None]:
    """Known errors become one readable line, never a traceback.

    Exit 2 for usage errors (a bad site file, a path that is missing or blocked by a file or
    not writable), 1 for problems in the data (a damaged shelf, a file that cannot be read)
    and for anything unforeseen, which names the exception so it can be reported (-vv adds
    the traceback).
    """
    try:
        yield
    except (click.ClickException, click.exceptions.Exit, click.Abort):
        raise  # click prints these itself (usage errors exit 2)
    except (SiteFileError, FileNotFoundError, NotADirectoryError, IsADirectoryError, FileExistsError,
            PermissionError) as exc:
        click.echo(f"scanshelf: error: {_describe(exc)}", err=True)
        sys.exit(2)
    except (ValueError, KeyError, OSError) as exc:
        click.echo(f"scanshelf: error: {_describe(exc)}", err=True)
        sys.exit(1)
    except Exception as exc:  # the last line of defence: a message, not a traceback
        logging.getLogger("scanshelf").debug("unexpected error", exc_info=True)
        click.echo(f"scanshelf: unexpected error ({type(exc).__name__}): {exc}; run with -vv for details "
                   "and please report it", err=True)
        sys.exit(1)


def _describe(exc: BaseException) -> str:
    """OSErrors carry the path apart from the text; KeyErrors quote their message."""
    if isinstance(exc, OSError) and exc.strerror and exc.filename:
        fix = {NotADirectoryError: "a file stands where a folder is needed; choose another path or move the file",
               FileExistsError: "a file stands where a folder is needed (or the name is taken); choose another path",
               PermissionError: "no permission; choose a path you can write or change its permissions",
               IsADirectoryError: "a folder stands where a file is needed; give a file name",
               FileNotFoundError: "check the path"}.get(type(exc), "")
        return f"{exc.filename}: {exc.strerror}" + (f"; {fix}" if fix else "")
    text = str(exc)
    return text.strip("'\"") if isinstance(exc, KeyError) else text


class Group(click.Group):
    """The command group; every command runs inside :func:`fail_cleanly`, also under CliRunner."""

    def invoke(self, ctx: click.Context) -> Any:
        with fail_cleanly():
            return super().invoke(ctx)


def parse_storage_options(pairs: tuple[Any, ...]) -> dict[str, Any]:
    """``key=value`` texts or already parsed pairs → a dict (values that parse as JSON are converted)."""
    return dict(p if isinstance(p, tuple) else params.KEY_VALUE_PAIR.convert(p, None, None) for p in pairs)


def storage_option(command: Callable[..., Any] | None = None, *, help: str | None = None,
                   ) -> Callable[..., Any]:
    """``-s/--storage-option KEY=VALUE`` (repeatable, passed on as ``storage_options``), one spelling
    for every command."""
    option = click.option(
        "-s", "--storage-option", "storage_options", multiple=True, metavar=params.KEY_VALUE,
        type=params.KEY_VALUE_PAIR,
        help=help or "fsspec storage option (repeatable), e.g. endpoint_url=http://127.0.0.1:9000 or anon=true. "
                     "Credentials are best left to the environment; values are never printed or written.",
    )
    return option(command) if command is not None else option


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


crs_option = click.option("--crs", type=params.CRS_OR_NONE,
                          help="CRS for files that declare none, e.g. EPSG:32633, or `none` for scans in a local "
                               "frame with no CRS (overrides the site file).")
quiet_option = click.option("-q", "--quiet", is_flag=True, help="No progress bars and no warnings.")
json_option = click.option("--json", "as_json", is_flag=True, help="Print the result as JSON (for scripts); no progress bars.")


def silence_warnings() -> None:
    """-q: no warnings from scanshelf or the libraries it calls, only errors."""
    import warnings

    warnings.simplefilter("ignore")
    logging.getLogger().setLevel(logging.ERROR)
