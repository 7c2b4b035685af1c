"""The invented site of the demo: a tidewater glacier front in a fjord, and how it moves.

Quillmere Glacier and Quillmere Inlet are fictional. The model is a handful of closed-form
functions so that any point at any time is cheap to evaluate in numpy, and so that tests can
compare what the files hold with what the model says (flow, thinning, tide).

Local frame: ``u`` points east (downglacier, towards the inlet), ``v`` north, metres, with the
origin at the middle of the calving front; ``SITE_ORIGIN`` places it in UTM zone 33N.
"""

from __future__ import annotations

from datetime import datetime, timezone

import numpy as np

SITE_NAME = "Quillmere Glacier (fictional)"
SITE_CRS = "EPSG:32633"  # WGS 84 / UTM zone 33N
SITE_ORIGIN = (512_400.0, 7_713_600.0)  # UTM easting, northing of the local (0, 0)

# Surface classes, as ASPRS LAS classification codes (LAS 1.4 R15, table "ASPRS Standard
# Point Classes"): glacier ice has no standard class, so it stays "unclassified".
ICE, ROCK, SHRUB, NOISE, WATER = 1, 2, 3, 7, 9

HALF_WIDTH = 430.0  # m, half width of the glacier tongue
FJORD_HALF_WIDTH = 600.0  # m
FRONT_HEIGHT = 35.0  # m above mean sea level at the front
SURFACE_SLOPE = 0.045  # rise per metre upglacier
FLOW_AT_FRONT = 4.0  # m/day at the front centre line
FLOW_DECAY = 1500.0  # m, e-folding length of the speed upglacier
THINNING = 0.04  # m/day of surface lowering, the same everywhere on the ice
# Semi-diurnal (M2) tide: period 12.42 h and a range of about 3 m are common values for
# the trade; used here as check values of the model, not as a forecast.
TIDE_AMPLITUDE = 1.5  # m (range 3 m)
TIDE_PERIOD_HOURS = 12.42
TIDE_FLOAT_LENGTH = 150.0  # m, e-folding length of the tidal flexure upglacier of the front
REFERENCE_TIME = datetime(2026, 9, 1, tzinfo=timezone.utc)  # days are counted from here
TIDE_HIGH_WATER = datetime(2026, 9, 1, 3, 10, tzinfo=timezone.utc)  # one invented high water

_REF = REFERENCE_TIME.timestamp()
_HW = TIDE_HIGH_WATER.timestamp()


def days_since_reference(posix_seconds: np.ndarray | float) -> np.ndarray | float:
    return (np.asarray(posix_seconds, dtype=np.float64) - _REF) / 86400.0


def tide(posix_seconds: np.ndarray | float) -> np.ndarray | float:
    """Sea level (m) at a UTC time given as POSIX seconds."""
    hours = (np.asarray(posix_seconds, dtype=np.float64) - _HW) / 3600.0
    return TIDE_AMPLITUDE * np.cos(2.0 * np.pi * hours / TIDE_PERIOD_HOURS)


def front_position(v: np.ndarray) -> np.ndarray:
    """u of the calving front: ragged, but fixed in time (calving balances the flow)."""
    return 12.0 * np.sin(v / 55.0) + 6.0 * np.cos(v / 23.0)


def flow_speed(u: np.ndarray, v: np.ndarray) -> np.ndarray:
    """Downglacier surface speed (m/day); zero off the ice."""
    w = v * v * (1.0 / HALF_WIDTH**2)
    across = np.maximum(1.0 - w * w, 0.0)
    return FLOW_AT_FRONT * np.exp(np.minimum(u, 0.0) / FLOW_DECAY) * across


def velocity(u: np.ndarray, v: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Surface velocity (east, north, up) in m/day of features riding on the ice.

    The flow converges slightly towards the centre line; the vertical part is what a tracked
    feature does: it follows the sloping surface down and sinks with the thinning.
    """
    ice = on_ice(u, v)
    speed = np.where(ice, flow_speed(u, v), 0.0)
    vy = -0.05 * (v / HALF_WIDTH) * speed
    vz = np.where(ice, -SURFACE_SLOPE * speed - THINNING, 0.0)
    return speed, vy, vz


def land(u: np.ndarray, v: np.ndarray) -> np.ndarray:
    """Bedrock and valley walls; the inlet floor lies deep below sea level."""
    av = np.abs(v)
    wall = 4.0 + 0.5 * np.maximum(av - HALF_WIDTH, 0.0) - 0.03 * np.minimum(u, 0.0)
    inlet = np.clip(u * (1 / 80.0), 0.0, 1.0) * np.clip((FJORD_HALF_WIDTH - av) * (1 / 60.0), 0.0, 1.0)
    wall -= 60.0 * inlet
    return wall


def ice_surface(u: np.ndarray, v: np.ndarray, posix_seconds: float) -> np.ndarray:
    """Ice surface elevation: slope, crowned profile, advected crevasses, thinning, tide."""
    days = float(days_since_reference(posix_seconds))
    speed = flow_speed(u, v)
    u0 = u - speed * days  # where the surface feature now at u started (advection)
    crown = 8.0 * (1.0 - (v / HALF_WIDTH) ** 2)
    crevasses = 0.8 * np.sin(2.0 * np.pi * u0 / 28.0 + v / 90.0) * np.clip(speed / FLOW_AT_FRONT, 0, 1)
    flexure = np.exp(np.minimum(u, 0.0) / TIDE_FLOAT_LENGTH)
    return (
        FRONT_HEIGHT
        + SURFACE_SLOPE * np.maximum(-u, 0.0)
        + crown
        + crevasses
        - THINNING * days
        + float(tide(posix_seconds)) * flexure
    )


def on_ice(u: np.ndarray, v: np.ndarray) -> np.ndarray:
    """Where the glacier is (the ragged front only matters within its 18 m of wobble)."""
    ice = (np.abs(v) < HALF_WIDTH) & (u < 18.0)
    near = np.flatnonzero(ice & (u > -18.0))
    ice[near] = u[near] < front_position(v[near])
    return ice


def height(u: np.ndarray, v: np.ndarray, posix_seconds: float) -> np.ndarray:
    """Elevation (m) of the visible surface at one instant: the ray caster's hot path."""
    z = np.maximum(land(u, v), float(tide(posix_seconds)))
    idx = np.flatnonzero(on_ice(u, v))
    z[idx] = np.maximum(z[idx], ice_surface(u[idx], v[idx], posix_seconds))
    return z


def surface(u: np.ndarray, v: np.ndarray, posix_seconds: float) -> tuple[np.ndarray, np.ndarray]:
    """Elevation (m) and surface class of the visible surface at one instant."""
    z = land(u, v)
    cls = np.full(z.shape, ROCK, np.uint8)
    sea = float(tide(posix_seconds))
    water = sea > z
    z[water] = sea
    cls[water] = WATER
    idx = np.flatnonzero(on_ice(u, v))
    ice = ice_surface(u[idx], v[idx], posix_seconds)
    ice_wins = ice >= z[idx]
    z[idx[ice_wins]] = ice[ice_wins]
    cls[idx[ice_wins]] = ICE
    return z, cls


def to_utm(u: np.ndarray, v: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    return u + SITE_ORIGIN[0], v + SITE_ORIGIN[1]


def to_local(x: np.ndarray, y: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    return x - SITE_ORIGIN[0], y - SITE_ORIGIN[1]
