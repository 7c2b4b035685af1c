"""``scanshelf demo``: write the demo source archive of an invented glacier site."""

from __future__ import annotations

import time

import click


@click.command("demo")
@click.argument("dest", default="scanshelf-demo", type=click.Path(file_okay=False))
@click.option("--seed", default=20261202, show_default=True, type=click.IntRange(0, 2**63 - 1),
              help="Same seed, byte-identical files.")
@click.option("--points", default=20_000, show_default=True, type=click.IntRange(100, 10**9), help="Points per scan.")
@click.option("--total-points", type=click.IntRange(1000, 10**12), default=None,
              help="Total points over all scans (overrides --points; for benchmark-sized archives).")
@click.option("--weeks", default=4, show_default=True, type=click.IntRange(1, 520), help="Weeks of scanning from 27 September.")
@click.option("--stations", default=2, show_default=True, type=click.IntRange(1, 2),
              help="1: the north scanner only; 2: north and south.")
@click.option("--no-faults", is_flag=True, help="Leave out the planted faults.")
@click.option("--workers", type=click.IntRange(1, 512), default=None, help="Processes writing scans (default: up to 2).")
@click.option("--overwrite", is_flag=True, help="Replace an existing DEST/source.")
def demo(dest, seed, points, total_points, weeks, stations, no_faults, workers, overwrite):
    """Write a messy legacy scan archive of a fictional glacier front, and its answer key.

    DEST/source/ gets LAS 1.2/1.4, LAZ and ASCII scans from two fixed scanners, grid
    products and planted faults; DEST/demo-truth.json says what every file holds and
    DEST/site.toml tells a migration what the files cannot.

    \b
    Examples:
        scanshelf demo ./scanshelf-demo --points 20000 --weeks 4
        scanshelf demo /data/big-demo --total-points 2000000000 --no-faults --workers 8
    """
    from archive.demo import make_demo  # xarray, rioxarray, dask: only for this command

    began = time.perf_counter()
    truth = make_demo(dest, seed=seed, points_per_scan=points, total_points=total_points, weeks=weeks,
                      stations=stations, faults=not no_faults, workers=workers, overwrite=overwrite)
    took = time.perf_counter() - began
    for f in truth.point_files:
        flag = f"  [{f.fault.kind}]" if f.fault else ""
        click.echo(f"{f.path:<52} {f.format:<5} {f.station:<6} {f.scan_time}  {f.recoverable_points:>10,}{flag}")
    for g in truth.grid_files:
        click.echo(f"{g.path:<52} {g.format:<10} {g.product:<12} crs={g.crs}")
    for o in truth.other_files:
        click.echo(f"{o.path:<52} ({o.note})")
    t = truth.totals
    click.echo(
        f"wrote {t['point_files']} point files ({t['scans']} scans, {t['points']:,} points), "
        f"{t['grid_files']} grid files, {t['other_files']} other files, {t['bytes'] / 1e6:.1f} MB "
        f"in {took:.1f} s to {dest}/source"
    )
    click.echo(f"answer key: {dest}/demo-truth.json" + (f"; site file: {dest}/{truth.site_file}" if truth.site_file else ""))
