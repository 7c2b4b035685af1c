"""`scanshelf find` and `scanshelf extract`: search and subset a shelf at any URL."""

from __future__ import annotations

import json
import sys

import click

from archive.cli import params
from archive.cli.common import silence_warnings, storage_option

_common = [
    click.option("--bbox", nargs=4, type=float, default=None, callback=params.check_bbox,
                 metavar="XMIN YMIN XMAX YMAX", help="Box in the shelf's CRS (or in --bbox-crs)."),
    click.option("--bbox-crs", type=params.CRS, help='CRS of --bbox, e.g. "EPSG:4326" (default: the shelf\'s).'),
    click.option("--crs", "old_crs", type=params.CRS, hidden=True),  # the old spelling of --bbox-crs
    click.option("--start", type=params.TIME, help="Earliest time, ISO 8601 (no zone = UTC)."),
    click.option("--end", type=params.TIME, help="Latest time, ISO 8601; a date alone means the end of that day."),
    click.option("--station", multiple=True, type=params.STATION, help="Only these stations (repeatable)."),
    storage_option,
]


def _with_common(f):
    for option in reversed(_common):
        f = option(f)
    return f


def _bbox_crs(bbox_crs: str | None, old_crs: str | None) -> str | None:
    """--crs was the old name of --bbox-crs in find and extract (it means "CRS of the files" elsewhere)."""
    if old_crs is not None:
        click.echo("scanshelf: warning: --crs is deprecated in find and extract; use --bbox-crs", err=True)
    return bbox_crs or old_crs


def _nothing_found(shelf) -> str:
    """Why nothing matched: the shelf's extent and time range, to compare with the query."""
    index = shelf.index
    if not len(index):
        return "no scans match: the shelf holds no scans"
    try:
        starts = [t for t in index["start_datetime"].to_pylist() if t] if "start_datetime" in index.column_names else []
        starts = starts or [t for t in index["datetime"].to_pylist() if t]
        ends = [t for t in index["end_datetime"].to_pylist() if t] if "end_datetime" in index.column_names else starts
        scans = shelf.find()
        boxes = [(b[0], b[1], b[3], b[4]) if len(b) == 6 else b for b in (s.bbox for s in scans) if b]
    except (KeyError, ValueError):
        return "no scans match"
    text = "no scans match; the shelf holds"
    if boxes:
        text += (f" scans within {min(b[0] for b in boxes):.0f} {min(b[1] for b in boxes):.0f} "
                 f"{max(b[2] for b in boxes):.0f} {max(b[3] for b in boxes):.0f} (XMIN YMIN XMAX YMAX, "
                 f"{shelf.crs.to_string() if shelf.crs is not None else 'no CRS'})")
    if starts:
        text += f" from {min(starts):%Y-%m-%d %H:%M} to {max(ends):%Y-%m-%d %H:%M} UTC"
    stations = sorted({s.station for s in scans})
    return text + (f", stations {', '.join(stations)}" if stations else "")


@click.command("find")
@click.argument("url", type=params.URL)
@_with_common
@click.option("--json", "as_json", is_flag=True, help="Print the matching STAC Items as JSON.")
def find(url, bbox, bbox_crs, old_crs, start, end, station, storage_options, as_json) -> None:
    """List the scans of the shelf at URL that meet a box and a time window.

    Only the shelf's items index is read.

    \b
    Examples:
      scanshelf find https://data.example.org/site-a --bbox 510900 7713500 511100 7713700 \\
          --start 2026-09-28 --end 2026-10-04
      scanshelf find ./shelf --bbox 15.279 69.530 15.284 69.532 --bbox-crs EPSG:4326
    """
    from archive.query import open_shelf

    params.check_window(start, end)
    shelf = open_shelf(url, params.storage_options(storage_options, url))
    scans = shelf.find(bbox=bbox, start=start, end=end, station=station or None, crs=_bbox_crs(bbox_crs, old_crs))
    if as_json:
        click.echo(json.dumps([json.loads(s.item_json) for s in scans], indent=1))
        return
    table = scans.to_pandas()[["id", "station", "start", "end", "point_count", "size"]]
    click.echo(table.to_string(index=False) if len(table) else _nothing_found(shelf))
    click.echo(f"{len(scans)} scan(s); {shelf.io}", err=True)


@click.command("extract")
@click.argument("url", type=params.URL)
@_with_common
@click.option("--columns", help="Comma-separated columns to keep besides x, y, z (default: all).")
@click.option("--bbox-fraction", type=params.PositiveType("a fraction of the area, e.g. 0.1", upper=1.0), help="Instead of --bbox: a centred box over this fraction of the scans' area.")
@click.option("-o", "--output", "out", required=True, type=params.OutputFile(".parquet", ".pq", ".las", ".laz", ".csv"), help="Output file: .parquet, .las, .laz or .csv.")
@click.option("-q", "--quiet", is_flag=True, help="No progress bar and no warnings.")
def extract(url, bbox, bbox_crs, old_crs, start, end, station, storage_options, columns, bbox_fraction, out,
            quiet) -> None:
    """Write the points of the shelf at URL inside --bbox to one file.

    Only footers and the row groups whose statistics meet the box are fetched. LAS/LAZ
    output keeps the scans' LAS scale and offset, so coordinates round-trip exactly.

    \b
    Example:
      scanshelf extract https://data.example.org/site-a --bbox 510900 7713500 511100 7713700 \\
          --start 2026-09-28 --columns intensity,classification -o subset.laz
    """
    from tqdm import tqdm

    from archive.query.export import extract as run

    if (bbox is None) == (bbox_fraction is None):
        raise click.UsageError("extract needs --bbox (or --bbox-fraction): subsets are what it is for")
    params.check_window(start, end)
    if quiet:
        silence_warnings()
    options = params.storage_options(storage_options, url)
    cols = [c.strip() for c in columns.split(",") if c.strip()] if columns else None
    with tqdm(unit="scan", desc="extract", file=sys.stderr, disable=quiet or None) as bar:
        def step(scan):
            bar.update(1)

        try:
            result = run(
                url, out, bbox, bbox_fraction=bbox_fraction, start=start, end=end,
                station=station or None, columns=cols, crs=_bbox_crs(bbox_crs, old_crs),
                storage_options=options, progress=step,
            )
        except KeyError as e:  # a column name the shelf does not have
            raise click.BadParameter(str(e).strip("'\""), param_hint="--columns") from None
    click.echo(f"{out}: {result.points:,} points from {result.scans} scan(s); {result.io}")
