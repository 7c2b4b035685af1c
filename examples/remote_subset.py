"""Open a published shelf by URL and take a small piece of it, the way a collaborator would.

Finds a week of scans over a small box, reads their points into pandas, plots the elevation
time series at one point from the station's grid cube, and prints what it cost in requests
and bytes fetched.

Run:
  python examples/remote_subset.py https://data.example.org/site-a   # any published shelf
  python examples/remote_subset.py                                   # builds the demo first

Without a URL the script builds the small demo shelf, publishes it to a temporary folder
standing in for a web root and reads it from there; serve that folder with a web server that
honours Range requests (nginx does) and pass its URL to read over HTTP instead.

Caution: grid elevations are per-cell means of whatever the scanner saw (vegetation, snow,
people). A change between epochs is a measurement, not yet an interpretation: check the
scans' `scanshelf:partial` flag and the cells' `elevation_std` and `point_count` before using
a series for hazard or safety decisions.
"""

from __future__ import annotations

import sys
import tempfile
from datetime import timedelta
from pathlib import Path

import matplotlib

matplotlib.use("Agg")
import matplotlib.pyplot as plt

from archive.query import open_shelf


def demo_shelf(work: Path) -> str:
    """Build, migrate and publish the small demo; return the published folder."""
    from archive.demo import make_demo
    from archive.migrate import migrate
    from archive.publish import publish

    make_demo(work / "demo", points_per_scan=5_000, weeks=2, overwrite=True)
    migrate(str(work / "demo/source"), str(work / "shelf"), site_file=str(work / "demo/site.toml"))
    publish(str(work / "shelf"), str(work / "www/site"))
    return str(work / "www/site")


def main(url: str, out: Path) -> None:
    shelf = open_shelf(url)
    every = shelf.find()
    print(every)
    station = every[0].station
    first = every[0].start
    week = {"start": first, "end": first + timedelta(days=7), "station": station}
    box = shelf.find(**week).central_bbox(0.01)  # 1 % of the station's footprint, centred
    scans = shelf.find(bbox=box, **week)
    print(f"\n{len(scans)} scan(s) of station {station} in the first week over {tuple(round(v, 1) for v in box)}")

    points = scans.read_points(columns=["x", "y", "z", "intensity"]).to_pandas()
    print(points.groupby("scan_id")["z"].describe()[["count", "mean", "min", "max"]])
    print(f"points read: {shelf.io}")

    cube = shelf.grids(station)
    cx, cy = points["x"].median(), points["y"].median()  # a spot the scanner does see
    series = cube["elevation"].sel(x=cx, y=cy, method="nearest").load()
    fig, ax = plt.subplots(figsize=(7, 3))
    series.plot(ax=ax, marker="o")
    ax.set_title(f"elevation at ({float(series.x):.1f}, {float(series.y):.1f}), station {station}")
    fig.tight_layout()
    png = out / "elevation-series.png"
    fig.savefig(png, dpi=100)
    print(f"\nelevation series of {int(series.notnull().sum())} epoch(s) → {png}")
    print(f"total cost of this session: {shelf.io}")


if __name__ == "__main__":
    work = Path(tempfile.mkdtemp(prefix="scanshelf-remote-"))
    main(sys.argv[1] if len(sys.argv) > 1 else demo_shelf(work), work)
