"""The health report: one self-contained HTML page about a shelf, readable offline and in print.

Pictures are embedded as PNG data URIs and the styling is inline, so the file works when it is
mailed, opened from disk or served as the shelf's ``index.html``; there is no script at all.
Links to the catalog and data are relative to the page, so they keep working once published.
"""

from __future__ import annotations

import base64
import html
import logging
import os
import posixpath
import uuid
from dataclasses import dataclass, field
from datetime import datetime, timedelta, timezone
from pathlib import Path
from urllib.parse import quote, urlsplit

import numpy as np

from archive import layout
from archive.grids import read_spec
from archive.report import charts
from archive.report.previews import GridMap
from archive.report.health import GAP_FACTOR, Problem, ShelfHealth, StationHealth, read_health
from archive.report.reuse import cube_key, earlier_blocks, wrap
from archive.storage import filesystem, is_local

log = logging.getLogger(__name__)

LATEST_SCANS = 12  # the scans table of a station lists this many, newest first
CAUTION = (
    "These data are measurements and carry errors: registration between scans, point density, "
    "vegetation, wet or moving surfaces and edge effects all show up as apparent change. Do not "
    "use them alone for hazard or engineering decisions; those follow local rules and licensed "
    "professional practice."
)


@dataclass
class ReportResult:
    """What was written, for the CLI's summary and for scripts."""

    path: str
    stations: list[str]
    scans: int
    points: int
    bytes: int
    gaps: int
    problems: int
    images: int
    size: int  # bytes of the HTML page
    notes: list[str] = field(default_factory=list)  # parts that could not be drawn, and why

    def summary(self) -> str:
        text = (f"{self.path}: {len(self.stations)} station(s), {self.scans} scans, {self.points:,} points, "
                f"{self.gaps} gap(s), {self.problems} problem(s); {self.images} images, {self.size:,} bytes")
        return "\n".join([text, *(f"  note: {n}" for n in self.notes)])


def build_report(shelf_url: str, output: str, storage_options: dict | None = None, *,
                 output_options: dict | None = None, gap_factor: float = GAP_FACTOR) -> ReportResult:
    """Write the health report of the shelf at ``shelf_url`` (folder or any URL) to ``output``.

    The page is written under a temporary name and renamed (locally) or put in one request, so
    a reader never sees half of it.
    """
    health = read_health(shelf_url, storage_options, gap_factor)
    base = _link_base(shelf_url, output)
    notes: list[str] = []
    earlier = earlier_blocks(_local_text(output, output_options))
    sections = [_station_section(shelf_url, storage_options, s, base, gap_factor, notes, earlier)
                for s in health.stations.values()]
    page = _page(health, sections, base, gap_factor)
    data = page.encode("utf-8")
    _write(output, data, output_options)
    return ReportResult(
        path=output, stations=list(health.stations), scans=health.scans, points=health.points,
        bytes=health.size, gaps=sum(len(s.gaps) for s in health.stations.values()),
        problems=health.problem_count, images=page.count("<img "), size=len(data), notes=notes,
    )


def write_index_html(shelf_path: str | os.PathLike) -> ReportResult:
    """Write the report as ``index.html`` at the root of a local shelf, where publish picks it up."""
    shelf = os.fspath(shelf_path)
    return build_report(shelf, str(Path(shelf) / layout.REPORT))


# --- links -----------------------------------------------------------------------------------


def _link_base(shelf_url: str, output: str) -> str:
    """Prefix that turns a shelf-relative path into a link that works from the page.

    A page inside a local shelf (or one headed for its root) links relatively; a page elsewhere
    on disk links back to the local shelf relatively; a page about a web shelf links to it.
    """
    shelf_url = str(shelf_url)
    scheme = urlsplit(shelf_url).scheme
    if scheme in ("http", "https"):
        from archive.hrefs import redact

        return redact(shelf_url).rstrip("/") + "/"
    out_scheme = urlsplit(str(output)).scheme
    if (scheme in ("", "file") or len(scheme) == 1) and (out_scheme in ("", "file") or len(out_scheme) == 1):
        shelf_dir = os.path.abspath(shelf_url.removeprefix("file://"))
        page_dir = os.path.dirname(os.path.abspath(str(output).removeprefix("file://")))
        rel = os.path.relpath(shelf_dir, page_dir).replace(os.sep, "/")
        return "" if rel == "." else rel.rstrip("/") + "/"
    return ""  # an object store: the page is meant for the shelf's root (publish puts it there)


def _href(base: str, rel: str) -> str:
    return html.escape(base + quote(rel, safe="/=.-_~"), quote=True)


# --- sections --------------------------------------------------------------------------------


def _station_section(shelf_url: str, storage_options: dict | None, st: StationHealth, base: str,
                     gap_factor: float, notes: list[str], earlier: dict[str, str]) -> str:
    parts = [f'<section class="station" id="station-{html.escape(st.station)}">',
             f'<h2><span class="label">station</span> {html.escape(st.station)}</h2>', _station_facts(st, base)]
    if st.scans:
        png = charts.coverage_chart([s.time for s in st.scans], [s.points for s in st.scans],
                                    [s.partial for s in st.scans], st.gaps,
                                    f"{st.station}: scans over time and points per scan")
        parts.append(_figure(png, f"Coverage of station {st.station}: one tick per scan, points per scan below",
                             _coverage_caption(st, gap_factor), wide=True))
        parts.append(_gap_list(st, gap_factor))
    parts.append(_maps(shelf_url, storage_options, st, notes, earlier))
    parts.append(_problem_table(st.problems, f"Problems at {st.station}"))
    if st.scans:
        parts.append(_scan_table(st, base))
    parts.append("</section>")
    return "\n".join(parts)


def _station_facts(st: StationHealth, base: str) -> str:
    if not st.scans:
        return '<p class="facts">No converted scans yet; see the problems below.</p>'
    first, last = st.scans[0].time, st.scans[-1].time
    items = [
        ("scans", f"{len(st.scans):,}"),
        ("first", _when(first)),
        ("latest", _when(last)),
        ("median interval", _duration(st.median_interval) if st.median_interval else "—"),
        ("points", f"{st.points:,}"),
        ("point files", _bytes(st.size)),
    ]
    facts = "".join(f"<div><dt>{k}</dt><dd>{v}</dd></div>" for k, v in items)
    links = (f'<p class="where">Data: <a href="{_href(base, f"points/station={st.station}/")}">points/station='
             f'{html.escape(st.station)}/</a> · <a href="{_href(base, layout.grid_path(st.station) + "/")}">'
             f'{html.escape(layout.grid_path(st.station))}</a> (Zarr v3) · '
             f'<a href="{_href(base, f"scans/items/{st.station}/")}">scans/items/{html.escape(st.station)}/</a></p>')
    return f'<dl class="facts">{facts}</dl>{links}'


def _coverage_caption(st: StationHealth, gap_factor: float) -> str:
    rule = (f"A gap (shaded) is an interval between consecutive scans longer than {gap_factor:g} × this "
            "station's median interval")
    if st.median_interval:
        rule += f" ({_duration(st.median_interval)}), i.e. longer than {_duration(gap_factor * st.median_interval)}"
    partial = " Red ticks are partial scans (salvaged from damaged files)." if any(s.partial for s in st.scans) else ""
    return f"{rule}.{partial}"


def _gap_list(st: StationHealth, gap_factor: float) -> str:
    if st.median_interval is None:
        return '<p class="quiet">One scan only: no interval to judge gaps by.</p>'
    if not st.gaps:
        return f'<p class="quiet">No gaps: no interval exceeds {gap_factor:g} × the median.</p>'
    rows = "".join(
        f"<tr><td>{_when(g.start)}</td><td>{_when(g.end)}</td><td>{_duration(g.length)}</td>"
        f"<td>{g.length / st.median_interval:.1f} ×</td></tr>"
        for g in st.gaps
    )
    return ('<table class="gaps"><caption>Gaps in coverage</caption><thead><tr><th>last scan before</th>'
            '<th>first scan after</th><th>length</th><th>of median</th></tr></thead>'
            f"<tbody>{rows}</tbody></table>")


def _maps(shelf_url: str, storage_options: dict | None, st: StationHealth, notes: list[str],
          earlier: dict[str, str]) -> str:
    """The station's maps: copied from the earlier page if its cube is unchanged, else drawn."""
    cube_url = f"{str(shelf_url).rstrip('/')}/{layout.grid_path(st.station)}"
    key = cube_key(st.station, cube_url, storage_options)
    if key is not None and key in earlier:
        return wrap(key, earlier[key])
    before = len(notes)
    block = _draw_maps(cube_url, storage_options, st, notes)
    return wrap(key if len(notes) == before else None, block)  # a block with a note is drawn again


def _draw_maps(cube_url: str, storage_options: dict | None, st: StationHealth, notes: list[str]) -> str:
    """Latest elevation, point density, change over the last interval and over the record.

    The few whole epochs are read through zarr alone (archive.grids.cube.cube_steps): a page
    built at the end of every migrate run should not import xarray and dask for four maps.
    """
    from archive.grids.cube import cube_steps

    try:
        spec = read_spec(cube_url, storage_options)
        if spec is None:
            notes.append(f"station {st.station}: no elevation cube ({layout.grid_path(st.station)})")
            return '<p class="quiet">No elevation cube for this station yet, so no maps.</p>'
        steps = cube_steps(cube_url, storage_options)
    except (OSError, ValueError, KeyError) as exc:
        notes.append(f"station {st.station}: cannot open {layout.grid_path(st.station)}: {exc}")
        return f'<p class="quiet">The elevation cube could not be read: {html.escape(str(exc))}</p>'
    times, ids = steps.times, steps.scan_ids
    if len(times) == 0:
        return '<p class="quiet">The elevation cube holds no epochs yet.</p>'
    # the epochs the maps and changes use (first, last but one, last), each read and decoded once:
    # the latest is in three pictures
    maps = {i: steps.read("elevation", i) for i in sorted({0, len(times) - 2, len(times) - 1} - {-1})}
    elevation = maps[len(times) - 1]
    rows, cols = _data_window(elevation)  # every map of the station shows this extent: one scale bar
    x, y = spec.x[cols], spec.y[rows]
    figures = [
        _figure(charts.elevation_map(GridMap(elevation[rows, cols], x, y), f"elevation, {ids[-1]}"),
                f"Elevation map of scan {ids[-1]}", f"Latest epoch ({_when(_utc(times[-1]))}), hillshaded."),
        _figure(charts.density_map(GridMap(steps.read("point_count", len(times) - 1)[rows, cols], x, y),
                                   f"point density, {ids[-1]}"),
                f"Point density of scan {ids[-1]}",
                "Points per m² in each grid cell of the latest epoch (log colours, 2nd to 98th percentile). "
                "Sparse cells make noisy elevations."),
    ]
    pairs = []
    if len(times) >= 2:
        pairs.append(("last interval", len(times) - 2, len(times) - 1))
    if len(times) >= 3:
        pairs.append(("whole record", 0, len(times) - 1))
    for label, i, j in pairs:
        # as archive.grids.change.epoch_change computes it, inside the window (outside it the
        # latest epoch has no data, so neither has the change)
        change = (maps[j][rows, cols] - maps[i][rows, cols]).astype(np.float32)
        figures.append(_figure(
            charts.change_map(GridMap(change, x, y), f"elevation change, {label}"),
            f"Elevation change over the {label} at station {st.station}",
            f"Change over the {label}: {ids[j]} − {ids[i]} ({_when(_utc(times[i]))} → "
            f"{_when(_utc(times[j]))}); "
            f"{int(np.isfinite(change).sum()):,} cells hold both epochs. Red lowering, blue raising.",
        ))
    if len(times) == 2:
        figures.append('<p class="quiet">Two epochs: the last interval is the whole record.</p>')
    elif len(times) < 2:
        figures.append('<p class="quiet">One epoch: no change to show yet.</p>')
    return '<div class="maps">' + "\n".join(figures) + "</div>"


def _data_window(elevation: np.ndarray) -> tuple[slice, slice]:
    """Rows and columns of the cube that hold data in ``elevation`` (all of it when none do)."""
    held = np.isfinite(elevation)
    rows, cols = np.flatnonzero(held.any(axis=1)), np.flatnonzero(held.any(axis=0))
    if not rows.size:
        return slice(None), slice(None)
    return slice(int(rows[0]), int(rows[-1]) + 1), slice(int(cols[0]), int(cols[-1]) + 1)


def _problem_table(problems: list[Problem], caption: str) -> str:
    if not problems:
        return f'<p class="quiet ok">{html.escape(caption)}: none recorded.</p>'
    rows = "".join(
        f'<tr class="{html.escape(p.status)}"><td><code>{html.escape(p.subject)}</code></td>'
        f'<td><span class="status">{html.escape(p.status)}</span></td><td>{html.escape(p.reason)}</td>'
        f"<td>{html.escape(p.origin)}</td></tr>"
        for p in problems
    )
    return (f'<table class="problems"><caption>{html.escape(caption)} ({len(problems)})</caption><thead><tr>'
            "<th>file or scan</th><th>status</th><th>reason</th><th>from</th></tr></thead>"
            f"<tbody>{rows}</tbody></table>")


def _scan_table(st: StationHealth, base: str) -> str:
    latest = st.scans[::-1][:LATEST_SCANS]
    rows = []
    for s in latest:
        data = f'<a href="{_href(base, s.points_href)}">Parquet</a>' if s.points_href else "—"
        rows.append(
            f"<tr><td><code>{html.escape(s.id)}</code></td><td>{_when(s.time)}</td>"
            f'<td class="num">{s.points:,}</td><td class="num">{_bytes(s.size)}</td>'
            f'<td><a href="{_href(base, s.item_href)}">Item</a> · {data}</td></tr>'
        )
    more = f" (latest {LATEST_SCANS} of {len(st.scans):,})" if len(st.scans) > LATEST_SCANS else ""
    return (f'<table class="scans"><caption>Scans{more}</caption><thead><tr><th>scan</th><th>time (UTC)</th>'
            '<th class="num">points</th><th class="num">size</th><th>files</th></tr></thead>'
            f"<tbody>{''.join(rows)}</tbody></table>")


def _figure(png: bytes, alt: str, caption: str, wide: bool = False) -> str:
    src = "data:image/png;base64," + base64.b64encode(png).decode("ascii")
    cls = ' class="wide"' if wide else ""
    return (f'<figure{cls}><img src="{src}" alt="{html.escape(alt, quote=True)}">'
            f"<figcaption>{html.escape(caption)}</figcaption></figure>")


# --- page ------------------------------------------------------------------------------------


def _page(health: ShelfHealth, sections: list[str], base: str, gap_factor: float) -> str:
    now = datetime.now(timezone.utc)
    figures = [
        ("stations", f"{len(health.stations):,}"),
        ("scans", f"{health.scans:,}"),
        ("points", f"{health.points:,}"),
        ("point files", _bytes(health.size)),
        ("problems", f"{health.problem_count:,}"),
    ]
    tally = "".join(f"<div><span class=\"n\">{v}</span><span class=\"k\">{k}</span></div>" for k, v in figures)
    files = [
        (layout.CATALOG, "STAC catalog (root)"),
        (layout.SCANS_COLLECTION, "scans Collection"),
        (layout.SCANS_INDEX, "all Items as STAC-GeoParquet (the search index)"),
        (layout.GRIDS_COLLECTION, "grids Collection"),
        (layout.SURVEY, "survey of the source files"),
        ("points/", "points, one Parquet file per scan"),
        ("grids/", "Zarr v3 station cubes"),
        ("previews/", "preview images"),
    ]
    links = "".join(f'<li><a href="{_href(base, rel)}"><code>{html.escape(rel)}</code></a> {html.escape(what)}</li>'
                    for rel, what in files)
    nav = " ".join(f'<a href="#station-{html.escape(s)}">{html.escape(s)}</a>' for s in health.stations)
    providers = ", ".join(health.providers) or "not given"
    unassigned = _problem_table(health.unassigned, "Files not tied to a station") if health.unassigned else ""
    # a page at the shelf's root is published with it: it names no local folder
    where = "the folder of this page" if base == "" else f"<code>{html.escape(health.url)}</code>"
    body = "\n".join(sections) or '<p class="quiet">This shelf holds no scans yet.</p>'
    return f"""<!doctype html>
<html lang="en">
<head>
<meta charset="utf-8">
<meta name="viewport" content="width=device-width, initial-scale=1">
<meta name="generator" content="scanshelf">
<title>{html.escape(health.title)} · shelf health</title>
<style>{STYLE}</style>
</head>
<body>
<header class="masthead">
<p class="kicker">Shelf health report · made {now:%Y-%m-%d %H:%M} UTC</p>
<h1>{html.escape(health.title)}</h1>
<p class="lede">{html.escape(health.description)}</p>
<dl class="meta">
<div><dt>licence</dt><dd>{html.escape(health.license or "not given")}</dd></div>
<div><dt>provider</dt><dd>{html.escape(providers)}</dd></div>
<div><dt>shelf</dt><dd>{where}</dd></div>
<div><dt>problems read from</dt><dd>{html.escape(", ".join(health.problem_sources))}</dd></div>
</dl>
<div class="tally">{tally}</div>
<p class="caution" role="note"><strong>Caution.</strong> {html.escape(CAUTION)}</p>
</header>
<nav class="toc" aria-label="stations"><span>Stations</span> {nav}</nav>
<main>
<section class="files">
<h2>Catalog and data</h2>
<p>Everything below is open formats; paths are relative to this page.</p>
<ul>{links}</ul>
</section>
{body}
{unassigned}
</main>
<footer>
<p>Gaps: an interval between consecutive scans of a station longer than {gap_factor:g} × that station's
median interval. Elevation, density and change maps come from the station cubes
(<code>grids/&lt;station&gt;.zarr</code>); change is later minus earlier epoch, cell by cell.
Problems merge the migration ledger (local shelves only), the source survey and the Items' own notes.</p>
<p>{html.escape(CAUTION)}</p>
</footer>
</body>
</html>
"""


STYLE = """
:root { --paper:#f6f3ec; --card:#fffdf8; --ink:#1f2a30; --soft:#5b676d; --rule:#d8d1c2;
  --accent:#2f6f73; --gap:#d9a441; --bad:#a33b2b; }
* { box-sizing:border-box; }
body { margin:0; background:var(--paper); color:var(--ink);
  font:15px/1.5 system-ui, -apple-system, "Segoe UI", Roboto, "Noto Sans", sans-serif; }
h1, h2, h3 { font-family: Georgia, "Iowan Old Style", "Times New Roman", serif; font-weight:600; }
a { color:var(--accent); }
code { font-family: ui-monospace, "DejaVu Sans Mono", Menlo, Consolas, monospace; font-size:0.88em; }
.masthead { padding:2rem 3rem 1.5rem; border-bottom:6px double var(--rule); background:var(--card); }
.kicker { margin:0; text-transform:uppercase; letter-spacing:.12em; font-size:.75rem; color:var(--soft); }
h1 { margin:.3rem 0 .4rem; font-size:2rem; }
.lede { max-width:60rem; color:var(--soft); margin:0 0 1rem; }
dl { margin:0; }
.meta { display:flex; flex-wrap:wrap; gap:.4rem 2rem; font-size:.9rem; }
.meta dt, .facts dt { font-size:.72rem; text-transform:uppercase; letter-spacing:.08em; color:var(--soft); }
.meta dd, .facts dd { margin:0; }
.tally { display:flex; flex-wrap:wrap; gap:0; margin:1.2rem 0; border-top:1px solid var(--rule);
  border-bottom:1px solid var(--rule); }
.tally div { padding:.6rem 1.6rem .6rem 0; margin-right:1.6rem; border-right:1px solid var(--rule); }
.tally div:last-child { border-right:0; }
.tally .n { display:block; font:600 1.5rem/1.1 Georgia, serif; }
.tally .k { font-size:.75rem; text-transform:uppercase; letter-spacing:.08em; color:var(--soft); }
.caution { max-width:60rem; border-left:4px solid var(--gap); padding:.4rem .8rem; background:#fbf3e2; margin:0; }
.toc { padding:.7rem 3rem; font-size:.9rem; border-bottom:1px solid var(--rule); }
.toc span { text-transform:uppercase; letter-spacing:.08em; font-size:.72rem; color:var(--soft); margin-right:.6rem; }
.toc a { margin-right:.9rem; }
main { padding:1rem 3rem 2rem; }
section { background:var(--card); border:1px solid var(--rule); border-left:5px solid var(--accent);
  padding:1rem 1.5rem 1.5rem; margin:1.5rem 0; }
section.files ul { columns:2; padding-left:1.1rem; }
h2 { margin:.2rem 0 .8rem; font-size:1.45rem; }
h2 .label { font:600 .7rem/1 system-ui, sans-serif; text-transform:uppercase; letter-spacing:.12em;
  color:var(--card); background:var(--accent); padding:.25rem .45rem; vertical-align:middle; margin-right:.4rem; }
.facts { display:grid; grid-template-columns:repeat(auto-fill, minmax(9rem, 1fr)); gap:.6rem 1rem; }
.where { font-size:.85rem; color:var(--soft); }
figure { margin:1rem 0; }
figure img { display:block; max-width:100%; height:auto; border:1px solid var(--rule); background:#fff; }
figure.wide img, .maps figure img { width:100%; }
figcaption { font-size:.82rem; color:var(--soft); margin-top:.3rem; max-width:48rem; }
.maps { display:grid; grid-template-columns:repeat(auto-fit, minmax(30rem, 1fr)); gap:0 1.5rem; }
.maps > p { grid-column:1 / -1; }
table { border-collapse:collapse; width:100%; margin:1rem 0; font-size:.86rem; }
caption { text-align:left; font:600 1rem Georgia, serif; padding-bottom:.3rem; }
th { text-align:left; font-weight:600; border-bottom:2px solid var(--ink); padding:.25rem .5rem; }
td { border-bottom:1px solid var(--rule); padding:.25rem .5rem; vertical-align:top; }
.num { text-align:right; font-variant-numeric:tabular-nums; }
table.gaps td:first-child { border-left:4px solid var(--gap); }
.status { font-size:.72rem; text-transform:uppercase; letter-spacing:.06em; padding:.05rem .35rem;
  border:1px solid currentColor; }
tr.failed .status, tr.unusable .status { color:var(--bad); }
tr.partial .status, tr.damaged .status, tr.duplicate .status { color:#8a5a12; }
tr.note .status { color:var(--soft); }
.quiet { color:var(--soft); font-style:italic; }
.quiet.ok::before { content:"✓ "; font-style:normal; color:var(--accent); }
footer { padding:1rem 3rem 2rem; font-size:.82rem; color:var(--soft); border-top:1px solid var(--rule); }
@media (max-width: 700px) {
  .masthead, main, .toc, footer { padding-left:1rem; padding-right:1rem; }
  section.files ul { columns:1; }
}
@media print {
  @page { margin:14mm; }
  body { background:#fff; font-size:10.5pt; }
  .masthead, section { background:#fff; }
  .toc { display:none; }
  main, .masthead, footer { padding-left:0; padding-right:0; }
  section { border:0; border-top:2px solid var(--ink); padding:0; break-before:page; }
  section.files { break-before:auto; }
  figure, table, tr, .facts { break-inside:avoid; }
  .maps { grid-template-columns:1fr 1fr; }
  a { color:var(--ink); text-decoration:none; }
  .files a[href]::after { content:" <" attr(href) ">"; font-size:.8em; color:var(--soft); }
  .caution { background:#fff; }
}
"""


# --- helpers ---------------------------------------------------------------------------------


def _local_text(output: str, options: dict | None) -> str:
    """An earlier page at ``output``, if local and readable (its map blocks may be reused)."""
    fs, path = filesystem(output, options)
    if not is_local(fs):
        return ""
    try:
        return fs.cat_file(path).decode("utf-8", errors="replace")
    except OSError:
        return ""


def _write(output: str, data: bytes, options: dict | None) -> None:
    fs, path = filesystem(output, options)
    parent = posixpath.dirname(path)
    if is_local(fs):
        if parent:
            fs.makedirs(parent, exist_ok=True)
        # a dot name: publish never uploads it, even if a crash leaves it behind
        tmp = f"{parent}/.{posixpath.basename(path)}.part-{uuid.uuid4().hex[:8]}"
        try:
            fs.pipe_file(tmp, data)
            fs.mv(tmp, path)
        finally:
            if fs.exists(tmp):
                fs.rm_file(tmp)
    else:
        fs.pipe_file(path, data)  # one PUT: readers see the old page or the new one


def _utc(t: np.datetime64) -> datetime:
    return datetime.fromisoformat(str(np.datetime64(t, "s"))).replace(tzinfo=timezone.utc)


def _when(t: datetime) -> str:
    return f"{t.astimezone(timezone.utc):%Y-%m-%d %H:%M}"


def _duration(d: timedelta) -> str:
    hours = d.total_seconds() / 3600
    if hours >= 48:
        return f"{hours / 24:.1f} d"
    if hours >= 1:
        return f"{hours:.1f} h"
    return f"{d.total_seconds() / 60:.0f} min"


def _bytes(n: float) -> str:
    """Decimal units (kB = 1000 B), as file browsers and object stores show sizes."""
    unit = "B"
    for unit in ("B", "kB", "MB", "GB", "TB"):
        if n < 1000 or unit == "TB":
            break
        n /= 1000
    return f"{n:,.0f} B" if unit == "B" else f"{n:,.1f} {unit}"
