"""``grid`` and ``change``: elevation cubes from a shelf's points, and change maps between epochs."""

from __future__ import annotations

import json

import click

from archive.cli import params
from archive.cli.common import storage_option


@click.command("grid")
@click.argument("shelf", type=params.URL)
@click.option("--cell", type=params.PositiveType("a cell size in metres, e.g. 0.5"), help="Cell size in metres (default: the existing cube's, else 1).")
@click.option("--station", type=params.STATION, help="Only this station (default: every station with points).")
@click.option("--margin", type=params.FiniteRange(0, 1e6), default=10.0, show_default=True,
              help="Metres added around the points' bounds when a grid is derived anew.")
@click.option("--no-series", is_flag=True, help="Skip the time-series copy (pixel histories read slower).")
@click.option("--series-only", is_flag=True,
              help="Only rebuild the time-series copies of the existing cubes (after migrations added epochs).")
@storage_option
def grid_command(shelf, cell, station, margin, no_series, series_only, storage_options) -> None:
    """Rebuild the elevation cubes grids/<station>.zarr of SHELF from its Parquet points.

    Every scan becomes one time step (mean, standard deviation and count of point elevations
    per cell) on its station's fixed grid. Points outside the grid are counted here and stay in
    the points archive.

    `migrate` appends each scan's time step to the map layout (one object per epoch) but does
    not rebuild the time-series copy (one object per 16 x 16 pixels, all epochs), which is
    rewritten whole; run `--series-only` when pixel histories should be fast again.

    \b
    Examples:
      scanshelf grid ./shelf --station north --cell 0.5
      scanshelf grid ./shelf --series-only
    """
    from archive.grids import grid_shelf, write_series

    options = params.storage_options(storage_options, shelf)
    if series_only:
        from archive import layout
        from archive.storage import filesystem

        fs, root = filesystem(shelf, options)
        cubes = [c for c in fs.glob(f"{root}/grids/*.zarr") if "-" not in c.rsplit("/", 1)[-1]]
        for cube in sorted(cubes):
            if station and not cube.endswith("/" + layout.grid_path(station)):
                continue
            write_series(cube if "://" not in shelf else fs.unstrip_protocol(cube), options)
            click.echo(f"{cube}: time-series copy rebuilt")
        _refresh_catalog(shelf, options)
        return

    results = grid_shelf(shelf, cell=cell, station=station, margin=margin, series=not no_series,
                         storage_options=options)
    for r in results:
        s = r.spec
        click.echo(f"{r.cube}: {r.scans} scans, {s.nx} x {s.ny} cells of {s.cell:g} m from "
                   f"({s.x0:.3f}, {s.y0:.3f}); {r.points} points binned, {r.outside} outside the grid")
    _refresh_catalog(shelf, options)


def _refresh_catalog(shelf: str, storage_options: dict) -> None:
    """Changed cubes change their fingerprints: the grids collection must say so, or verify and publish refuse."""
    from archive import layout
    from archive.catalog import update_catalog
    from archive.storage import filesystem, join

    fs, root = filesystem(shelf, storage_options)
    if fs.exists(join(root, layout.CATALOG)):
        update_catalog(shelf, [], storage_options=storage_options)


@click.command("change")
@click.argument("shelf", type=params.URL)
@click.option("--station", required=True, type=params.STATION, help="Station id.")
@click.option("--from", "t0", required=True, type=params.TIME, help="Time of the first epoch (ISO 8601, UTC); the nearest epoch is used.")
@click.option("--to", "t1", required=True, type=params.TIME, help="Time of the second epoch; the nearest epoch is used.")
@click.option("-o", "--output", required=True, type=params.OutputFile(".zarr", ".tif", ".tiff", ".png"), help="Output .zarr, .tif or .png (local path or fsspec URL).")
@click.option("--stable-area", type=click.Path(exists=True, dir_okay=False),
              help="GeoJSON file (geometry, Feature or FeatureCollection) of ground that did not move, in the grid CRS.")
@storage_option
def change_command(shelf, station, t0, t1, output, stable_area, storage_options) -> None:
    """Elevation change of STATION between the epochs nearest to --from and --to.

    Prints the two scans used, the number of cells with data in both, and, with --stable-area,
    the median and NMAD of the change over ground that should not have moved (an estimate of
    the registration error between the scans: check it before reading change as movement).

    \b
    Example:
      scanshelf change ./shelf --station north --from 2025-06-01 --to 2026-06-01 \\
          --stable-area bedrock.geojson -o north-change.tif
    """
    from archive.grids import elevation_change

    options = params.storage_options(storage_options, shelf)
    area = None
    if stable_area:
        area = _read_area(stable_area)
    result = elevation_change(shelf, station, t0, t1, stable_area=area, storage_options=options)
    result.export(output, storage_options=options)
    for key, value in result.summary().items():
        click.echo(f"{key}: {value}")
    click.echo(f"written: {output}")


def _read_area(path: str):
    """The --stable-area file as one shapely geometry; a usage error names the file when it is not GeoJSON."""
    try:
        with open(path, encoding="utf-8") as f:
            return _geometry_of(json.load(f), path)
    except (ValueError, KeyError, TypeError, AttributeError) as exc:
        raise click.BadParameter(f"{path}: not a GeoJSON geometry, Feature or FeatureCollection ({exc})",
                                 param_hint="--stable-area") from None


def _geometry_of(doc: dict, name: str):
    """A shapely geometry from a GeoJSON geometry, Feature or FeatureCollection (union)."""
    import shapely
    import shapely.geometry

    if doc.get("type") == "FeatureCollection":
        geoms = [shapely.geometry.shape(f["geometry"]) for f in doc.get("features", [])]
    elif doc.get("type") == "Feature":
        geoms = [shapely.geometry.shape(doc["geometry"])]
    else:
        geoms = [shapely.geometry.shape(doc)]
    if not geoms:
        raise ValueError(f"{name} holds no geometry; give a Polygon in the grid's CRS")
    return shapely.union_all(geoms)
