"""A demo source archive of an invented glacier site, with an answer key for tests.

``make_demo(dest)`` writes a messy legacy archive under ``dest/source/``, what each file
should yield to ``dest/demo-truth.json`` (outside the source tree, so a survey cannot see it)
and ``dest/site.toml`` when some files need one. ``DemoTruth.load`` reads the key back.

The site, Quillmere Glacier, is fictional: a tidewater glacier front in UTM zone 33N watched by
two fixed scanners. Its surface flows east by metres a day, thins a few centimetres a day
and, near the front, rises and falls with a semi-diurnal tide. The data are invented for
software testing and say nothing about any real glacier or hazard.

What ``dest/source/`` holds (station ids are the first folder level, no rename needed)::

    README.txt                          lab notes (not data)
    north/YYYY/MM/N_YYYYMMDD_HHMMSS.las  LAS 1.4 format 6, extra bytes, WKT CRS, adjusted GPS time
    north/YYYY/MM/N_YYYYMMDD_HHMMSS.LAS  the same, upper-case extension
    north/YYYY/MM/N_YYYYMMDD_HHMMSS.laz  LAS 1.4 format 7 (RGB), compressed
    north/backup/scan copy YYYY-MM-DD.las  a byte-identical duplicate (fault)
    north/products/DEM_YYYYMMDD.tif      GeoTIFF DEM
    north/products/dem_YYYYMMDD.nc       NetCDF DEM (CF grid_mapping)
    north/products/displacement_A_B.tif  vx, vy, vz bands (m d-1)
    south/raw/S_YYYYMMDD_HHMMSS.LAS      LAS 1.2 format 1, GeoTIFF keys, GPS week time
    south/raw/S_YYYYMMDD_HHMMSS.laz      LAS 1.2 format 3 (RGB), compressed
    south/exports/South export YYYYMMDDTHHMMSS.csv   X,Y,Z,Intensity,Time (no CRS)
    south/exports/scan YYYYMMDD_HHMMSS xyz.txt       x y z intensity gps_time (no CRS)
    south/exports/Thumbs.db              thumbnail cache (not data)
    south/products/dem YYYYMMDD.asc (+ .prj)   ESRI ASCII grid DEM
    south/products/velocity_utm32.nc     vx, vy, vz in EPSG:32632 (a foreign CRS)
    south/products/strain_rate.tif       no CRS at all

Planted faults (``faults=True``): a truncated LAS 1.4 file, a LAS 1.2 header claiming more
points than stored, a CSV export with NaN and malformed rows, the duplicate above and a LAS
1.4 file without any CRS record. Each is described, with the points a salvage can keep, in
the truth file. Files whose CRS or time the zero-config path cannot know list it in
``needs_site_file``; the site file supplies them.
"""

from archive.demo.make import make_demo
from archive.demo.truth import DemoTruth, Fault, GridFile, OtherFile, PointFile, StationInfo

__all__ = ["DemoTruth", "Fault", "GridFile", "OtherFile", "PointFile", "StationInfo", "make_demo"]
