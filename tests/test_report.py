"""The health report: one section per station, embedded PNGs, gaps, problems, links, Chromium."""

from __future__ import annotations

import base64
import io
import json
import os
import re
import shutil
import subprocess
import tempfile
import uuid
from datetime import timedelta
from html.parser import HTMLParser
from pathlib import Path

import numpy as np
import pytest
from PIL import Image

from archive import layout
from archive.report import ReportResult, write_index_html
from archive.report.health import find_gaps, read_health
from tests.conftest import IN_CI
from tests.factory import utc
from tests.servers import nginx  # noqa: F401 (fixture)

ARTIFACTS = Path(__file__).resolve().parents[1] / "test-artifacts"


class Page(HTMLParser):
    """The parts of the page the tests look at: sections, images, links."""

    def __init__(self) -> None:
        super().__init__()
        self.sections: list[str] = []
        self.images: list[dict[str, str]] = []
        self.links: list[str] = []
        self.scripts = 0
        self.external: list[str] = []

    def handle_starttag(self, tag, attrs):
        a = dict(attrs)
        if tag == "section" and "station" in (a.get("class") or "").split():
            self.sections.append(a["id"])
        elif tag == "img":
            self.images.append(a)
        elif tag == "a" and "href" in a:
            self.links.append(a["href"])
        elif tag == "script":
            self.scripts += 1
        elif tag == "link":
            self.external.append(a.get("href", ""))


@pytest.fixture(scope="module")
def report(small_shelf, tmp_path_factory) -> tuple[Path, ReportResult, Page]:
    """The index.html of a copy of the shared shelf (the shared one stays untouched)."""
    shelf, _, _ = small_shelf
    copy = tmp_path_factory.mktemp("report") / "shelf"
    shutil.copytree(shelf, copy)
    result = write_index_html(copy)
    page = Page()
    page.feed((copy / layout.REPORT).read_text("utf-8"))
    return copy, result, page


def test_one_section_per_station(report):
    shelf, result, page = report
    assert page.sections == ["station-north", "station-south"]
    assert result.stations == ["north", "south"]
    assert result.scans == 5 and result.points == 40_000 + 30_000 + 1_000 + 25_000 + 5_000
    assert not list(shelf.glob(".index.html.part-*")) and not list(shelf.glob("index.html.part-*"))


def test_every_image_is_an_embedded_png(report):
    _, result, page = report
    # per station: coverage, elevation, density; north has 3 epochs (2 change maps), south 2 (1)
    assert len(page.images) == result.images == 3 + 2 + 3 + 1
    for img in page.images:
        src = img["src"]
        assert src.startswith("data:image/png;base64,"), src[:40]
        data = base64.b64decode(src.split(",", 1)[1], validate=True)
        with Image.open(io.BytesIO(data)) as im:  # reference: Pillow decodes the PNG
            assert im.format == "PNG"
            im.load()
            assert im.size[0] > 300 and im.size[1] > 200
        assert img["alt"]


def test_self_contained_no_scripts_and_relative_links_resolve(report):
    shelf, _, page = report
    html = (shelf / layout.REPORT).read_text("utf-8")
    assert page.scripts == 0 and page.external == []
    assert "http://" not in html and "https://" not in html  # nothing fetched from the network
    assert "@media print" in html
    files = [h for h in page.links if not h.startswith("#")]
    for must in ("catalog.json", "scans/collection.json", "scans/items.parquet", "points/", "grids/"):
        assert must in files
    for href in files:
        assert not re.match(r"^[a-z]+:", href) and not href.startswith("/"), href
        target = shelf / href.replace("%3D", "=")
        assert target.exists(), f"link {href} leads nowhere"
    # every scan of north is linked to its Item and its points file
    assert "scans/items/north/north-20260901T060000Z.json" in files
    assert "points/station=north/year=2026/north-20260901T060000Z.parquet" in files


def test_the_root_page_names_no_local_folder(report):
    shelf, _, _ = report
    text = (shelf / layout.REPORT).read_text("utf-8")
    assert str(shelf) not in text and str(shelf.parent) not in text  # it is published as is
    assert "the folder of this page" in text


def test_unchanged_stations_keep_their_maps_and_changed_ones_are_redrawn(report, tmp_path, monkeypatch):
    from archive.report import charts

    shelf, _, _ = report
    copy = tmp_path / "shelf"
    shutil.copytree(shelf, copy)
    first = (copy / layout.REPORT).read_text("utf-8")
    drawn = []
    real = charts.elevation_map
    monkeypatch.setattr(charts, "elevation_map", lambda da, title: drawn.append(title) or real(da, title))
    write_index_html(copy)
    assert drawn == []  # no cube changed: every map block comes from the earlier page
    assert _maps_blocks((copy / layout.REPORT).read_text("utf-8")) == _maps_blocks(first)

    chunk = next(p for p in (copy / "grids/south.zarr").rglob("*") if p.is_file() and "elevation" in str(p))
    os.utime(chunk, ns=(chunk.stat().st_atime_ns, chunk.stat().st_mtime_ns + 10**9))  # "rewritten"
    write_index_html(copy)
    assert len(drawn) == 1 and drawn[0].startswith("elevation, south"), drawn
    again = _maps_blocks((copy / layout.REPORT).read_text("utf-8"))
    assert len(again) == 2 and again[0] == _maps_blocks(first)[0] and again[1] != _maps_blocks(first)[1]


def _maps_blocks(page: str) -> list[str]:
    return re.findall(r"<!-- scanshelf-maps [0-9a-f]{64} -->.*?<!-- /scanshelf-maps -->", page, flags=re.S)


def test_caution_header_and_gap_rule_are_stated(report):
    shelf, _, _ = report
    text = (shelf / layout.REPORT).read_text("utf-8")
    assert "Do not use them alone for hazard or engineering decisions" in text
    assert "longer than 1.5 × this station&#x27;s median interval" in text
    assert "Untitled shelf" in text and "licence" in text


def test_gap_found_at_north(report):
    """north scans at 06:00 and 12:00 on 1 Sep, then 06:00 on 4 Sep: median 36 h, the 66 h hole is a gap."""
    shelf, result, _ = report
    health = read_health(str(shelf))
    north = health.stations["north"]
    assert north.median_interval == timedelta(hours=36)
    assert [(g.start, g.end) for g in north.gaps] == [(utc(2026, 9, 1, 12), utc(2026, 9, 4, 6))]
    assert health.stations["south"].gaps == []
    assert result.gaps == 1


def test_gaps_on_a_synthetic_timeline():
    hourly = [utc(2026, 5, 1) + timedelta(hours=h) for h in range(10)]
    times = hourly[:4] + hourly[9:] + [utc(2026, 5, 1, 4, 30)]  # a 4.5 h hole after 04:30
    gaps, median = find_gaps(times)
    assert median == timedelta(hours=1)
    assert [(g.start, g.end) for g in gaps] == [(utc(2026, 5, 1, 4, 30), utc(2026, 5, 1, 9))]
    # exactly 1.5 × the median is not a gap; a little more is
    steps = [utc(2026, 5, 1) + timedelta(minutes=m) for m in (0, 60, 120, 210)]
    assert find_gaps(steps)[0] == []
    assert len(find_gaps(steps[:3] + [utc(2026, 5, 1, 3, 31)])[0]) == 1
    assert find_gaps([utc(2026, 5, 1)]) == ([], None)
    assert find_gaps(hourly * 2)[0] == []  # repeated times count once


def test_problems_from_ledger_per_station(report):
    shelf, result, _ = report
    health = read_health(str(shelf))
    assert health.problem_sources == ["ledger", "survey", "catalog"]
    north = {p.subject: p for p in health.stations["north"].problems}
    assert north["north/2026/09/trunc.las"].status == "failed"
    assert north["north/copy of scan_a.las"].status == "duplicate"
    south = {p.subject: p for p in health.stations["south"].problems}
    assert south["south/exports/bad 20260903T060000.csv"].status == "failed"
    assert "3 malformed" in south["south/exports/bad 20260903T060000.csv"].reason
    assert health.unassigned == []  # notes.txt is ignored, not a problem
    assert result.problems == 3
    text = (shelf / layout.REPORT).read_text("utf-8")
    assert "north/2026/09/trunc.las" in text and "Problems at south (1)" in text


def test_published_shelf_over_http_uses_survey_and_catalog(report, nginx):
    """Served by nginx, the shelf has no ledger: problems come from the survey and the Items."""
    from archive.publish import publish

    shelf, _, _ = report
    name = f"site-{uuid.uuid4().hex[:8]}"
    publish(str(shelf), str(nginx.root / name))
    url = f"{nginx.url}/{name}"
    assert (nginx.root / name / layout.REPORT).exists() and not (nginx.root / name / layout.LEDGER).exists()
    health = read_health(url)
    assert health.problem_sources == ["survey", "catalog"]
    north = {p.subject: p for p in health.stations["north"].problems}
    assert north["north/2026/09/trunc.las"].status == "damaged"
    assert north["north/2026/09/trunc.las"].origin == "survey"
    assert health.scans == 5 and health.url == url
    assert [(g.start, g.end) for g in health.stations["north"].gaps] == [(utc(2026, 9, 1, 12), utc(2026, 9, 4, 6))]


def test_missing_catalog_names_the_fix(tmp_path):
    from archive.report import build_report

    with pytest.raises(FileNotFoundError, match="no catalog.json"):
        build_report(str(tmp_path), str(tmp_path / "r.html"))


# --- Chromium ----------------------------------------------------------------------------------

CHECK = """<script>
window.__errors = [];
window.addEventListener('error', e => window.__errors.push(String(e.message || (e.target && e.target.tagName))), true);
window.addEventListener('load', () => {
  const imgs = [...document.images];
  document.body.setAttribute('data-check', JSON.stringify({
    images: imgs.length,
    loaded: imgs.filter(i => i.complete && i.naturalWidth > 0).length,
    sections: document.querySelectorAll('section.station').length,
    errors: window.__errors,
  }));
});
</script>"""


def _chromium() -> str:
    found = shutil.which("chromium")
    if found is None:
        message = "chromium is not installed; install it with `apt-get install -y chromium` (CI: .ci/run does)"
        if IN_CI:
            pytest.fail(message)
        pytest.skip(message)
    return found


def _run_chromium(binary: str, *args: str) -> subprocess.CompletedProcess:
    profile = tempfile.mkdtemp(prefix="scanshelf-chromium-")
    try:
        return subprocess.run(
            [binary, "--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
             "--disable-background-networking", "--disable-component-update", "--disable-sync",
             "--disable-dev-shm-usage", "--hide-scrollbars", f"--user-data-dir={profile}", *args],
            check=False, capture_output=True, text=True, timeout=120,
        )
    finally:
        shutil.rmtree(profile, ignore_errors=True)


def test_renders_in_headless_chromium(report, tmp_path):
    binary = _chromium()
    shelf, result, _ = report
    page = shelf / layout.REPORT
    # 1. the page itself: a screenshot, kept as an artifact, must not be blank
    ARTIFACTS.mkdir(exist_ok=True)
    shot = ARTIFACTS / "report.png"
    shot.unlink(missing_ok=True)
    done = _run_chromium(binary, f"--screenshot={shot}", "--window-size=1280,2400", page.as_uri())
    assert done.returncode == 0, done.stderr[-2000:]
    with Image.open(shot) as im:
        pixels = np.asarray(im.convert("L"), dtype=float)
    assert pixels.shape == (2400, 1280)
    assert pixels.std() > 20, "screenshot is (nearly) blank"
    # 2. a test copy with a checking script (the product has none): every image decoded, no errors
    probe = tmp_path / "probe.html"
    probe.write_text(page.read_text("utf-8").replace("<head>", "<head>" + CHECK, 1), "utf-8")
    done = _run_chromium(binary, "--dump-dom", "--virtual-time-budget=15000", probe.as_uri())
    assert done.returncode == 0, done.stderr[-2000:]
    found = re.search(r'data-check="([^"]*)"', done.stdout)
    assert found, "the load event never fired: " + done.stdout[:500]
    check = json.loads(found.group(1).replace("&quot;", '"'))
    assert check == {"images": result.images, "loaded": result.images, "sections": 2, "errors": []}
