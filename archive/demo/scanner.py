"""Points as a fixed terrestrial scanner records them: column by column, in sweep order.

The head turns in azimuth (one column per step, clockwise) while the mirror sweeps the
elevation angle upwards within a column; each pulse is ray-cast onto the site's surface.
Equal angular steps make the point density fall with range, pulses are timed evenly over
the scan's duration, and shrubs on the rock give a second return. Scans are produced in
chunks of whole columns so that a scan of any size needs bounded memory.
"""

from __future__ import annotations

import math
from collections.abc import Iterator
from dataclasses import dataclass

import numpy as np

from archive.demo import site

CHUNK_BEAMS = 262_144  # pulses per generated chunk; fixed so output never depends on memory
EXTRA_RETURN_FRACTION = 0.04  # planning guess for second returns (shrubs)
GPS_EPOCH_POSIX = 315_964_800.0  # 1980-01-06T00:00:00Z, start of GPS time
# GPS time runs ahead of UTC by the leap seconds since 1980: 18 s since 2017-01-01
# (from memory; no leap second has been added since).
GPS_MINUS_UTC = 18.0
_STEPS = np.geomspace(8.0, 9000.0, 24)  # ray-marching ranges (m), then bisection
_BISECTIONS = 9

# reflectivity at the laser's wavelength and 8-bit RGB of each surface class, by LAS class code
_REFLECTIVITY = np.zeros(16)
_COLOUR = np.zeros((16, 3))
for _cls, _rho, _rgb in (
    (site.ICE, 0.45, (196, 214, 228)),
    (site.ROCK, 0.30, (112, 100, 88)),
    (site.SHRUB, 0.50, (86, 112, 58)),
    (site.NOISE, 0.10, (240, 240, 240)),
    (site.WATER, 0.03, (30, 52, 70)),
):
    _REFLECTIVITY[_cls], _COLOUR[_cls] = _rho, _rgb


@dataclass(frozen=True)
class Station:
    """One fixed scanner: where it stands, what it sweeps and how long a scan takes."""

    id: str
    number: int  # LAS point_source_id
    u: float  # local east (m)
    v: float  # local north (m)
    height: float  # instrument above ground (m)
    azimuth: tuple[float, float]  # compass degrees, clockwise sweep from first to second
    elevation: tuple[float, float]  # degrees, negative below the horizon
    duration: float  # seconds for a full scan
    delay: float  # seconds after the scheduled hour that this station starts

    @property
    def local_origin(self) -> tuple[float, float, float]:
        ground = float(site.land(np.array(self.u), np.array(self.v)))
        return self.u, self.v, ground + self.height

    @property
    def origin(self) -> tuple[float, float, float]:
        """Scanner position in the site CRS (easting, northing, height)."""
        u, v, z = self.local_origin
        x, y = site.to_utm(u, v)
        return round(float(x), 3), round(float(y), 3), round(float(z), 3)


STATIONS = (
    Station("north", 1, 520.0, 760.0, 1.8, (185.0, 265.0), (-25.0, -1.5), 360.0, 0.0),
    Station("south", 2, 560.0, -820.0, 1.6, (275.0, 355.0), (-25.0, -1.5), 270.0, 1200.0),
)


def utc_to_gps(posix_seconds: np.ndarray | float) -> np.ndarray | float:
    """UTC (POSIX seconds) → GPS seconds since the GPS epoch."""
    return np.asarray(posix_seconds, dtype=np.float64) - GPS_EPOCH_POSIX + GPS_MINUS_UTC


def _plan(station: Station, n_points: int) -> tuple[int, int]:
    """Rows per column and planned columns so that the sweep covers the field of view."""
    beams = max(4, math.ceil(n_points / (1.0 + EXTRA_RETURN_FRACTION)))
    az_span = (station.azimuth[1] - station.azimuth[0]) % 360.0
    el_span = station.elevation[1] - station.elevation[0]
    rows = max(2, round(math.sqrt(beams * el_span / az_span)))
    return rows, math.ceil(beams / rows)


def _cast(origin: tuple[float, float, float], d: np.ndarray, t: float) -> np.ndarray:
    """Range to the first surface hit of each ray (NaN when none within the last step).

    March outwards in growing steps to bracket the first crossing, halve the bracket, then
    finish with false-position steps (millimetres on smooth surfaces).
    """
    ou, ov, oz = origin
    n = d.shape[1]

    def above(s: np.ndarray | float, dk: np.ndarray) -> np.ndarray:
        return oz + s * dk[2] - site.height(ou + s * dk[0], ov + s * dk[1], t)

    lo = np.full(n, _STEPS[0])
    hi = np.full(n, np.nan)
    close = above(_STEPS[0], d) <= 0  # ground within the first step: the scanner's own hill
    lo[close], hi[close] = 0.1, _STEPS[0]  # 0.1 m out the ray is still above the ground
    for s in _STEPS[1:]:
        idx = np.flatnonzero(np.isnan(hi))
        if idx.size == 0:
            break
        below = above(s, d[:, idx]) <= 0
        hi[idx[below]] = s
        lo[idx[~below]] = s
    ok = np.isfinite(hi)
    lo, hi, dk = lo[ok], hi[ok], d[:, ok]
    for _ in range(_BISECTIONS):
        mid = 0.5 * (lo + hi)
        below = above(mid, dk) <= 0
        hi = np.where(below, mid, hi)
        lo = np.where(below, lo, mid)
    f_lo, f_hi = above(lo, dk), above(hi, dk)  # f_lo > 0 >= f_hi by construction
    for _ in range(3):
        mid = lo + (hi - lo) * f_lo / (f_lo - f_hi)
        f_mid = above(mid, dk)
        below = f_mid <= 0
        hi, f_hi = np.where(below, mid, hi), np.where(below, f_mid, f_hi)
        lo, f_lo = np.where(below, lo, mid), np.where(below, f_lo, f_mid)
    distance = np.full(n, np.nan)
    distance[ok] = lo + (hi - lo) * f_lo / (f_lo - f_hi)
    return distance


def sweep(station: Station, start: float, n_points: int, seed: tuple[int, ...]) -> Iterator[dict[str, np.ndarray]]:
    """Yield the points of one scan in recording order, in chunks of whole columns.

    ``start`` is the UTC time (POSIX seconds) of the first pulse. Columns ``x, y, z`` are in
    the site CRS, ``gps_time`` in GPS seconds since the GPS epoch (not adjusted); the rest are
    LAS-like attributes. Exactly ``n_points`` points come out in total.
    """
    rows, cols = _plan(station, n_points)
    az0 = station.azimuth[0]
    daz = ((station.azimuth[1] - az0) % 360.0) / cols
    el = np.radians(np.linspace(station.elevation[0], station.elevation[1], rows))
    dt = station.duration / (rows * cols)
    origin = station.local_origin
    most = max(1, CHUNK_BEAMS // rows)
    cols_per_chunk = min(most, cols)
    emitted, first_col, chunk = 0, 0, 0
    while emitted < n_points:
        if chunk:  # size the next chunk by the points per column seen so far
            per_col = max(emitted / first_col, 1.0)
            cols_per_chunk = min(most, math.ceil(1.05 * (n_points - emitted) / per_col) + 1)
        rng = np.random.default_rng((*seed, chunk))
        col = np.arange(first_col, first_col + cols_per_chunk)
        az = np.radians(az0 + (col + 0.5) * daz)
        beam_col = np.repeat(col, rows)
        beam_el = np.tile(el, col.size)
        beam_az = np.repeat(az, rows)
        cos_el = np.cos(beam_el)
        d = np.stack([np.sin(beam_az) * cos_el, np.cos(beam_az) * cos_el, np.sin(beam_el)])
        t_beam = start + (beam_col * rows + np.tile(np.arange(rows), col.size)) * dt
        points = _returns(origin, d, t_beam, float(t_beam[0]), rng)
        take = min(n_points - emitted, points["x"].size)
        if take < points["x"].size:
            points = {k: a[:take] for k, a in points.items()}
            last = take - 1
            if points["return_number"][last] < points["number_of_returns"][last]:
                points["number_of_returns"][last] = points["return_number"][last]
        emitted += take
        first_col += col.size
        chunk += 1
        if take:
            points["point_source_id"] = np.full(take, station.number, np.uint16)
            yield points


def _returns(
    origin: tuple[float, float, float], d: np.ndarray, t_beam: np.ndarray, t: float, rng: np.random.Generator
) -> dict[str, np.ndarray]:
    """Ray-cast a block of pulses and turn hits into returns with their attributes."""
    distance = _cast(origin, d, t)
    hit = np.isfinite(distance)
    d, t_beam = d[:, hit], t_beam[hit]
    distance = distance[hit] + rng.normal(0.0, 0.004, hit.sum())  # ranging noise
    ou, ov, oz = origin
    u, v = ou + distance * d[0], ov + distance * d[1]
    cls = site.surface(u, v, t)[1]
    # shrubs on low rocky slopes return twice: canopy first, ground second
    shrub = (cls == site.ROCK) & (np.sin(u / 13.0) * np.cos(v / 11.0) + 0.3 * np.sin(u / 5.0 + v / 7.0) > 0.75)
    bird = rng.random(distance.size) < 2e-4
    shrub &= ~bird
    n_ret = np.where(shrub, 2, 1)
    beam = np.repeat(np.arange(distance.size), n_ret)
    first = np.repeat(np.cumsum(n_ret) - n_ret, n_ret)
    return_number = (np.arange(beam.size) - first + 1).astype(np.uint8)
    number_of_returns = n_ret[beam].astype(np.uint8)
    r = distance[beam]
    point_cls = cls[beam].copy()
    canopy = (number_of_returns == 2) & (return_number == 1)
    lift = rng.uniform(0.3, 1.2, beam.size)
    r = np.where(canopy, np.maximum(r - lift / np.maximum(-d[2][beam], 0.05), 0.5 * r), r)
    point_cls[canopy] = site.SHRUB
    noisy = bird[beam]
    r = np.where(noisy, rng.uniform(0.2, 0.8, beam.size) * r, r)  # a bird in the beam
    point_cls[noisy] = site.NOISE
    du, dv, dz = d[:, beam]
    x, y = site.to_utm(ou + r * du, ov + r * dv)
    z = oz + r * dz
    refl = _REFLECTIVITY[point_cls] * rng.lognormal(0.0, 0.15, beam.size)
    reflectance = 10.0 * np.log10(refl)  # dB, range corrected
    amplitude = reflectance - 20.0 * np.log10(r / 100.0)  # falls with range
    colour = np.clip(_COLOUR[point_cls] + rng.normal(0.0, 8.0, (beam.size, 3)), 0, 255)
    return {
        "x": x,
        "y": y,
        "z": z,
        "intensity": np.clip(np.rint((amplitude + 50.0) * 900.0), 0, 65535).astype(np.uint16),
        "return_number": return_number,
        "number_of_returns": number_of_returns,
        "classification": point_cls,
        "gps_time": utc_to_gps(t_beam[beam]),
        "red": (np.rint(colour[:, 0]) * 256).astype(np.uint16),
        "green": (np.rint(colour[:, 1]) * 256).astype(np.uint16),
        "blue": (np.rint(colour[:, 2]) * 256).astype(np.uint16),
        "reflectance": reflectance.astype(np.float32),
        "deviation": (rng.poisson(3.0, beam.size) + 20 * (number_of_returns > 1)).astype(np.uint16),
    }
