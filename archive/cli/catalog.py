"""``scanshelf catalog`` and ``scanshelf verify``: thin skins over archive.catalog."""

from __future__ import annotations

import sys

import click

from archive.cli import params
from archive.cli.common import site_option, storage_option
from archive.sitefile import load_site_file


@click.command("catalog")
@click.argument("shelf", type=click.Path(exists=True, file_okay=False))
@site_option
def catalog_command(shelf: str, site_file: str | None) -> None:
    """Rebuild the STAC catalog of a local SHELF from its ledger.

    Writes every Item, both Collections, the search index scans/items.parquet and, last,
    catalog.json. Grid cubes are described from the Zarr stores on the shelf. License, title
    and providers come from the site file's [catalog] table when --site is given, else the
    ones already in the catalog are kept.

    \b
    Example:
      scanshelf catalog ./site-shelf --site site.toml
      scanshelf verify ./site-shelf
    """
    from archive.catalog import rebuild_catalog  # pystac, pyproj, rasterio: only for this command

    settings = load_site_file(site_file).catalog if site_file else None
    result = rebuild_catalog(shelf, settings=settings)
    for warning in result.warnings:
        click.echo(f"warning: {warning}", err=True)
    click.echo(f"{shelf}: catalog of {result.item_count} scans and {result.grid_count} grid cubes written")


@click.command("verify")
@click.argument("shelf", type=params.URL)
@click.option("--online", is_flag=True, help="Also validate against the official extension schemas by URL.")
@click.option("--quick", is_flag=True, help="Compare file sizes only (no checksums, no point counts).")
@storage_option
def verify_command(shelf: str, online: bool, quick: bool, storage_options: tuple[str, ...]) -> None:
    """Check SHELF (a path or fsspec URL) against its own catalog.

    Validates every STAC document offline (the STAC 1.1 core schemas shipped with pystac,
    stac-pydantic, a pystac round trip, and scanshelf's renderings of the extension schemas),
    recomputes the size and checksum of every asset, compares point counts, and checks that
    the search index matches the Item JSON. Exits 1 when anything differs, naming the file.

    \b
    Examples:
      scanshelf verify ./site-shelf
      scanshelf verify ./site-shelf --quick
      scanshelf verify s3://bucket/site-shelf -s endpoint_url=http://127.0.0.1:9000
    """
    from archive.catalog import verify_shelf  # pystac, jsonschema, stac-pydantic: only for this command

    report = verify_shelf(shelf, online=online, quick=quick, storage_options=params.storage_options(storage_options, shelf))
    click.echo(report.summary())
    sys.exit(0 if report.ok else 1)
