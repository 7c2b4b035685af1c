"""A scanner's or project's own coordinate frame: coordinates with no CRS.

Terrestrial scans are often registered in a local frame that no EPSG code describes. Saying
``--crs none`` (or ``crs = "none"`` in the site file's [site] table) declares that: the scans
carry this engineering CRS (WKT2 ``ENGCRS``, metres, x east, y north, z up, no datum), their
Items have ``geometry: null`` and no ``bbox`` (STAC allows both for Items that are not
georeferenced), their native box stays in ``proj:bbox``, and ``find(bbox=...)`` searches in the
frame's own coordinates.
"""

from __future__ import annotations

NO_CRS = ("none", "local")  # the words --crs and [site] crs take for "no CRS"
LOCAL_FRAME_NAME = "local frame (no CRS)"
LOCAL_FRAME_WKT = (
    f'ENGCRS["{LOCAL_FRAME_NAME}",EDATUM["unknown"],CS[Cartesian,3],'
    'AXIS["x",east,ORDER[1],LENGTHUNIT["metre",1]],AXIS["y",north,ORDER[2],LENGTHUNIT["metre",1]],'
    'AXIS["z",up,ORDER[3],LENGTHUNIT["metre",1]]]'
)


def declares_no_crs(value: str | None) -> bool:
    """True for the words that say the coordinates are in a local frame."""
    return value is not None and value.strip().lower() in NO_CRS


def is_local(crs_wkt: str | None) -> bool:
    """True for the local-frame CRS (or any engineering CRS: it cannot be placed on the Earth)."""
    if not crs_wkt:
        return False
    return crs_wkt.lstrip().upper().startswith(("ENGCRS", "ENGINEERINGCRS", "LOCAL_CS"))
