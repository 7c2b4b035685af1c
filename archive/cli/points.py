"""``survey`` and ``migrate``: from a legacy source to a shelf."""

from __future__ import annotations

import dataclasses
import json
import sys

import click

from archive.cli import params
from archive.cluster import DEFAULT_MEMORY_PER_WORKER
from archive.cli.common import crs_option, json_option, quiet_option, silence_warnings, site_option, storage_option


@click.command("survey")
@click.argument("source", type=params.URL)
@site_option
@crs_option
@click.option("-o", "--output", default="survey.parquet", show_default=True, type=params.OutputFile(".parquet"), help="Where to write the survey table (Parquet).")
@click.option("--quick", is_flag=True, help="Read headers only (no point pass): faster, finds less.")
@storage_option
@quiet_option
@json_option
def survey_command(source, site_file, crs, output, quick, storage_options, quiet, as_json) -> None:
    """Inventory a SOURCE archive: every file, its station, time, points, CRS and problems.

    SOURCE is a folder or any fsspec URL (s3://bucket/archive, ...). The whole walk always
    finishes; the exit code is 0 only when every file is usable.

    \b
    Example:
      scanshelf survey /mnt/labserver/tls --crs EPSG:32633 -o survey.parquet
    """
    from archive.survey import survey

    if quiet or as_json:
        silence_warnings()
    result = survey(source, site_file, crs, storage_options=params.storage_options(storage_options, source),
                    deep=not quick, progress=not (quiet or as_json))
    result.write(output)
    if as_json:
        rows = result.table().drop_columns(["crs_wkt"]).to_pylist()
        click.echo(json.dumps({"ok": result.ok, "output": output, "files": rows}, default=str))
    else:
        click.echo(result.summary())
        click.echo(f"\nsurvey table written to {output}")
    sys.exit(0 if result.ok else 1)


@click.command("migrate")
@click.argument("source", type=params.URL)
@click.argument("shelf", type=click.Path(file_okay=False))
@site_option
@crs_option
@click.option("--salvage", is_flag=True, help="Convert the readable points of damaged files and mark those scans partial.")
@click.option("--cell", type=params.PositiveType("a cell size in metres, e.g. 0.5"), help="Grid cell size in metres for the elevation cubes (default: the site file, else 1).")
@click.option("--no-previews", is_flag=True, help="Do not render a preview PNG per scan.")
@click.option("--workers", type=click.IntRange(1, 512), help="Run on a local dask cluster with this many worker processes.")
@click.option("--scheduler", metavar="ADDRESS", callback=params.check_scheduler, help="Run on an existing dask scheduler, e.g. tcp://10.0.0.5:8786.")
@click.option("--memory-per-worker", default=DEFAULT_MEMORY_PER_WORKER, type=params.BYTES,
              help=f"Memory limit of each local worker (default {DEFAULT_MEMORY_PER_WORKER / 2**30:g}GiB); "
                   "the sort of one scan stays within it.")
@storage_option
@quiet_option
@json_option
def migrate_command(source, shelf, site_file, crs, salvage, cell, no_previews, workers, scheduler, memory_per_worker,
                    storage_options, quiet, as_json) -> None:
    """Convert every scan in SOURCE into the local SHELF folder.

    Each scan becomes a spatially sorted Parquet file under points/, its elevation a time step
    in grids/<station>.zarr, and a STAC Item in the catalog. Bad files never stop the run: they
    are listed at the end and make the exit code 1. Re-running the same command skips what is
    done and finishes the rest; new or changed source files are converted.

    On a cluster, every scan is one dask task; the workers must see SHELF at the same path
    (a shared file system) and read SOURCE themselves (a shared folder or an fsspec URL).

    \b
    Examples:
      scanshelf migrate /mnt/labserver/tls ./shelf --site site.toml
      scanshelf migrate ./demo/source ./shelf --salvage
      scanshelf migrate /mnt/labserver/tls /scratch/shelf --workers 2 --memory-per-worker 2GiB
      scanshelf migrate s3://lab-archive/tls /scratch/shelf --scheduler tcp://10.0.0.5:8786
    """
    from archive.migrate import MigrateOptions, migrate

    if quiet or as_json:
        silence_warnings()
    options = MigrateOptions(salvage=salvage, cell=cell, storage_options=params.storage_options(storage_options, source),
                             progress=not (quiet or as_json), previews=not no_previews, workers=workers,
                             scheduler=scheduler, memory_per_worker=memory_per_worker)
    result = migrate(source, shelf, site_file, crs, options=options)
    click.echo(json.dumps(dataclasses.asdict(result) | {"ok": result.ok}) if as_json else result.summary())
    sys.exit(0 if result.ok else 1)
