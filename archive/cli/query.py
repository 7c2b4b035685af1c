"""`scanshelf find` and `scanshelf extract`: search and subset a shelf at any URL."""

from __future__ import annotations

import json
import sys

import click

from archive.cli.common import parse_storage_options
from archive.cli.publish import STORAGE_OPTION_HELP

_common = [
    click.option("--bbox", nargs=4, type=float, default=None,
                 help="XMIN YMIN XMAX YMAX in the shelf's CRS (or in --crs)."),
    click.option("--crs", help='CRS of --bbox, e.g. "EPSG:4326" (default: the shelf\'s).'),
    click.option("--start", help="Earliest time, ISO 8601 (no zone = UTC)."),
    click.option("--end", help="Latest time, ISO 8601; a date alone means the end of that day."),
    click.option("--station", multiple=True, help="Only these stations (repeatable)."),
    click.option("--storage-option", "-s", "storage_option", multiple=True, help=STORAGE_OPTION_HELP),
]


def _with_common(f):
    for option in reversed(_common):
        f = option(f)
    return f


@click.command("find")
@click.argument("url")
@_with_common
@click.option("--json", "as_json", is_flag=True, help="Print the matching STAC Items as JSON.")
def find(url, bbox, crs, start, end, station, storage_option, as_json) -> None:
    """List the scans of the shelf at URL that meet a box and a time window.

    Only the shelf's items index is read.

    \b
    Example:
      scanshelf find https://data.example.org/site-a --bbox 512050 5420050 512080 5420080 \\
          --start 2026-03-01 --end 2026-03-07
    """
    from archive.query import open_shelf

    shelf = open_shelf(url, parse_storage_options(storage_option))
    scans = shelf.find(bbox=bbox, start=start, end=end, station=station or None, crs=crs)
    if as_json:
        click.echo(json.dumps([json.loads(s.item_json) for s in scans], indent=1))
        return
    table = scans.to_pandas()[["id", "station", "start", "end", "point_count", "size"]]
    click.echo(table.to_string(index=False) if len(table) else "no scans match")
    click.echo(f"{len(scans)} scan(s); {shelf.io}", err=True)


@click.command("extract")
@click.argument("url")
@_with_common
@click.option("--columns", help="Comma-separated columns to keep besides x, y, z (default: all).")
@click.option("--bbox-fraction", type=float, help="Instead of --bbox: a centred box over this fraction of the scans' area.")
@click.option("-o", "--output", "out", required=True, help="Output file: .parquet, .las, .laz or .csv.")
@click.option("-q", "--quiet", is_flag=True, help="No progress bar.")
def extract(url, bbox, crs, start, end, station, storage_option, columns, bbox_fraction, out, quiet) -> None:
    """Write the points of the shelf at URL inside --bbox to one file.

    Only footers and the row groups whose statistics meet the box are fetched. LAS/LAZ
    output keeps the scans' LAS scale and offset, so coordinates round-trip exactly.

    \b
    Example:
      scanshelf extract https://data.example.org/site-a --bbox 512050 5420050 512080 5420080 \\
          --start 2026-03-01 --columns intensity,classification -o subset.laz
    """
    from tqdm import tqdm

    from archive.query.export import extract as run

    if (bbox is None) == (bbox_fraction is None):
        raise click.UsageError("extract needs --bbox (or --bbox-fraction): subsets are what it is for")
    cols = [c.strip() for c in columns.split(",") if c.strip()] if columns else None
    with tqdm(unit="scan", desc="extract", file=sys.stderr, disable=quiet or None) as bar:
        def step(scan):
            bar.update(1)

        try:
            result = run(
                url, out, bbox, bbox_fraction=bbox_fraction, start=start, end=end,
                station=station or None, columns=cols, crs=crs,
                storage_options=parse_storage_options(storage_option), progress=step,
            )
        except (ValueError, KeyError, FileNotFoundError) as e:
            raise click.ClickException(str(e).strip("'\"")) from None
    click.echo(f"{out}: {result.points:,} points from {result.scans} scan(s); {result.io}")
