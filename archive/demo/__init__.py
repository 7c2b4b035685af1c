"""A demo source archive of an invented glacier site, with an answer key for tests.

``make_demo(dest)`` writes a messy legacy archive (LAS 1.2/1.4, LAZ, ASCII exports, grid
products, planted faults) under ``dest/source/`` and what each file should yield to
``dest/demo-truth.json``; ``DemoTruth.load`` reads that key back.
"""

from archive.demo.make import make_demo
from archive.demo.truth import DemoTruth, Fault, GridFile, OtherFile, PointFile, StationInfo

__all__ = ["DemoTruth", "Fault", "GridFile", "OtherFile", "PointFile", "StationInfo", "make_demo"]
