"""The ``scanshelf`` command: a thin skin over the library.

Each command parses its options, calls one library function and prints its result; the logic
lives in the library so that everything here can also be done from Python.
"""

from __future__ import annotations

import atexit
import contextlib
import logging
import os
import sys
from typing import NoReturn

import click

from archive.cli.catalog import catalog_command, verify_command
from archive.cli.common import Group, fail_cleanly
from archive.cli.demo import demo
from archive.cli.grids import change_command, grid_command
from archive.cli.points import migrate_command, survey_command
from archive.cli.publish import publish
from archive.cli.query import extract, find
from archive.cli.report import report_command, watch_command


@click.group(cls=Group, context_settings={"help_option_names": ["-h", "--help"], "max_content_width": 100})
@click.version_option(package_name="scanshelf")
@click.option("-v", "--verbose", count=True, help="More log output (-vv for debug).")
def cli(verbose: int) -> None:
    """Migrate, publish and subset archives of repeated laser scans.

    \b
    A typical first day with a legacy archive:
      scanshelf demo ./demo                       # or use your own source folder
      scanshelf survey ./demo/source              # what is there, what is broken
      scanshelf migrate ./demo/source ./shelf     # Parquet points, Zarr grids, STAC catalog
      scanshelf verify ./shelf                    # validate the catalog and checksums
      scanshelf publish ./shelf file:///srv/www/shelf
      scanshelf find ./shelf --bbox 510900 7713500 511100 7713700
    """
    logging.basicConfig(level=[logging.WARNING, logging.INFO, logging.DEBUG][min(verbose, 2)],
                        format="%(levelname)s %(name)s: %(message)s")


for command in (demo, survey_command, migrate_command, grid_command, change_command, catalog_command,
                verify_command, publish, find, extract, report_command, watch_command):
    cli.add_command(command)


def main() -> NoReturn:
    """The ``scanshelf`` script: run one command, then end the process (see :func:`_end`)."""
    # numpy's OpenBLAS starts one thread per core at import, and they spin for about 0.1 CPU-s
    # before they sleep (measured: `python -c "import numpy"` 0.19 against 0.09 CPU-s). No command
    # does linear algebra, so one thread loses nothing (dask's nanny gives its workers the same default,
    # distributed.yaml `pre-spawn-environ`). Set here, before the commands' lazy first import of
    # numpy; a user's own setting wins.
    os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")
    try:
        with fail_cleanly():
            cli(standalone_mode=True)
    except SystemExit as done:
        _end(done.code if isinstance(done.code, int) else (0 if done.code is None else 1))
    _end(0)


def _end(code: int) -> NoReturn:
    """Flush, run Python's exit handlers, and leave without the interpreter's native teardown.

    After a command had finished and printed its result, a native library's destructor aborted
    the process now and then during interpreter teardown (SIGABRT, exit 134; about 1 run in 30
    to 60 of ``scanshelf find``, no Python frame involved). Everything a command writes is
    closed by the command itself, so skipping that teardown loses nothing.
    """
    atexit._run_exitfuncs()
    logging.shutdown()
    for stream in (sys.stdout, sys.stderr):
        with contextlib.suppress(OSError, ValueError):  # a closed pipe (`| head`) is no error here
            stream.flush()
    os._exit(code)
