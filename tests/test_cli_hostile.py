"""Every command, every option that takes a value, and a table of bad values for each.

A bad value must end in one readable line naming the option or file, with exit code 2 (usage)
or 1 (a problem in the data), and never a traceback. The table is checked against the commands
themselves, so an option added later without rows here fails ``test_the_table_covers_every_option``.
"""

from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path

import click
import pytest
from click.testing import CliRunner

from archive.cli import cli
from tests import factory
from tests.killing import write_source

ROOT = Path(__file__).resolve().parents[1]
GOOD_SITE = "version = 1\n"
BAD_SITES = {
    "include-string": '[paths]\ninclude = "**/*.las"\n',
    "extent-number": "[grids.extent]\nnorth = 5\n",
    "origin-number": '[stations.north]\nid = "north"\norigin = 5\n',
    "cell-zero": "[grids]\ncell = 0\n",
    "unknown-section": "[colour]\nred = 1\n",
    "not-toml": "this is = = not toml\n",
    "bad-crs": '[site]\ncrs = "EPSG:99999999"\n',
    "bad-regex": "[paths]\ntime = '(?P<time>['\n",
}


@pytest.fixture(scope="module")
def world(tmp_path_factory) -> dict[str, str]:
    """A source, its shelf, a blocking file and the site files the table refers to by name."""
    from archive.migrate import migrate

    base = tmp_path_factory.mktemp("hostile")
    write_source(base / "source", "first")
    assert migrate(str(base / "source"), str(base / "shelf"), crs=factory.SITE_CRS, previews=False).ok
    (base / "afile").write_text("in the way\n")
    (base / "good.toml").write_text(GOOD_SITE)
    for name, text in BAD_SITES.items():
        (base / f"{name}.toml").write_text(text)
    (base / "not.geojson").write_text("{not json")
    (base / "empty.geojson").write_text('{"type": "FeatureCollection", "features": []}')
    return {"base": str(base), "src": str(base / "source"), "shelf": str(base / "shelf"),
            "blocked": str(base / "afile" / "sub")}


# (command, option, bad values, expected exit code); "{...}" is filled from the fixture
NUMBERS = ["0", "-1", "nan", "inf", "x"]
TABLE: list[tuple[str, str, list[str], int]] = [
    ("demo", "DEST", ["{blocked}"], 2),
    ("demo", "--seed", ["-1", "x"], 2),
    ("demo", "--points", ["0", "-5", "x", "1e3"], 2),
    ("demo", "--total-points", ["0", "-5", "x"], 2),
    ("demo", "--weeks", ["0", "-1", "x", "100000"], 2),
    ("demo", "--stations", ["0", "3", "x"], 2),
    ("demo", "--workers", ["0", "-1", "x"], 2),
    ("survey", "SOURCE", ["{base}/missing", "nope://x", ""], 2),
    ("survey", "--site", ["{base}/missing.toml", "{base}", *(f"{{base}}/{n}.toml" for n in BAD_SITES)], 2),
    ("survey", "--recipe", ["{base}/missing.toml", "{base}/cell-zero.toml"], 2),
    ("survey", "--crs", ["EPSG:99999999", "foo", ""], 2),
    ("survey", "--output", ["{blocked}/s.parquet", "{base}"], 2),
    ("survey", "--storage-option", ["novalue", "=x", " a=1"], 2),
    ("migrate", "SOURCE", ["{base}/missing", "nope://x"], 2),
    ("migrate", "SHELF", ["{blocked}", "{base}/afile"], 2),
    ("migrate", "--site", ["{base}/missing.toml", *(f"{{base}}/{n}.toml" for n in BAD_SITES)], 2),
    ("migrate", "--recipe", ["{base}/extent-number.toml"], 2),
    ("migrate", "--crs", ["EPSG:99999999", "foo"], 2),
    ("migrate", "--cell", NUMBERS, 2),
    ("migrate", "--workers", ["0", "-1", "x", "100000"], 2),
    ("migrate", "--scheduler", ["foo", "tcp://", "http://x:1:2"], 2),
    ("migrate", "--memory-per-worker", ["lots", "1KB", "-1GiB"], 2),
    ("migrate", "--storage-option", ["novalue"], 2),
    ("grid", "SHELF", ["nope://x"], 2),
    ("grid", "--cell", NUMBERS, 2),
    ("grid", "--margin", ["-1", "nan", "x"], 2),
    ("grid", "--storage-option", ["novalue"], 2),
    ("grid", "--station", ["no-such-station"], 2),
    ("change", "SHELF", ["nope://x"], 2),
    ("change", "--station", ["no-such-station"], 2),
    ("change", "--from", ["yesterday", "2026-13-45"], 2),
    ("change", "--to", ["tomorrow", "2026-02-30"], 2),
    ("change", "--output", ["{base}/x.txt", "nope://x.tif"], 2),
    ("change", "--stable-area", ["{base}/missing.geojson", "{base}/not.geojson", "{base}/empty.geojson"], 2),
    ("change", "--storage-option", ["novalue"], 2),
    ("catalog", "SHELF", ["{base}/missing", "{base}/afile"], 2),
    ("catalog", "--site", ["{base}/missing.toml", *(f"{{base}}/{n}.toml" for n in BAD_SITES)], 2),
    ("catalog", "--recipe", ["{base}/unknown-section.toml"], 2),
    ("verify", "SHELF", ["nope://x", ""], 2),
    ("verify", "--storage-option", ["novalue"], 2),
    ("publish", "SHELF", ["{base}/missing", "nope://x"], 2),
    ("publish", "DEST", ["{base}/afile", "{blocked}", "nope://x"], 2),
    ("publish", "--storage-option", ["novalue", "=1"], 2),
    ("publish", "--workers", ["0", "-1", "x"], 2),
    ("publish", "--retries", ["0", "-1", "x"], 2),
    ("find", "URL", ["{base}/missing", "nope://x"], 2),
    ("find", "--bbox", ["1 2 0 0", "0 0 nan 1", "0 0 inf 1", "a b c d"], 2),
    ("find", "--bbox-crs", ["EPSG:99999999", "foo"], 2),
    ("find", "--crs", ["foo"], 2),
    ("find", "--start", ["yesterday", "2026-02-30", "2026-10-02 --end 2026-10-01"], 2),
    ("find", "--end", ["tomorrow"], 2),
    ("find", "--station", ["--bbox"], 2),
    ("find", "--storage-option", ["novalue"], 2),
    ("extract", "URL", ["{base}/missing", "nope://x"], 2),
    ("extract", "--bbox", ["1 2 0 0", "0 0 nan 1"], 2),
    ("extract", "--bbox-crs", ["foo"], 2),
    ("extract", "--crs", ["foo"], 2),
    ("extract", "--start", ["yesterday", "2026-10-02 --end 2026-10-01"], 2),
    ("extract", "--end", ["tomorrow"], 2),
    ("extract", "--station", ["--bbox"], 2),
    ("extract", "--storage-option", ["novalue"], 2),
    ("extract", "--columns", ["no_such_column"], 2),
    ("extract", "--bbox-fraction", ["0", "-0.5", "2", "nan", "x"], 2),
    ("extract", "--output", ["{base}/x.txt", "{blocked}/x.laz", "{base}/afile/x.laz"], 2),
    ("report", "SHELF", ["nope://x"], 2),
    ("report", "--output", ["{base}/r.txt", "{blocked}/r.html"], 2),
    ("report", "--storage-option", ["novalue"], 2),
    ("report", "--gap-factor", ["0.5", "-1", "nan", "x"], 2),
    ("watch", "SOURCE", ["nope://x"], 2),
    ("watch", "SHELF", ["{base}/afile"], 2),
    ("watch", "--publish", ["nope://x"], 2),
    ("watch", "--every", ["10 parsecs", "-5m", "x"], 2),
    ("watch", "--rounds", ["0", "-1", "x"], 2),
    ("watch", "--site", ["{base}/missing.toml", *(f"{{base}}/{n}.toml" for n in BAD_SITES)], 2),
    ("watch", "--recipe", ["{base}/missing.toml"], 2),
    ("watch", "--crs", ["foo"], 2),
    ("watch", "--storage-option", ["novalue"], 2),
    ("watch", "--publish-option", ["novalue", "a=1"], 2),  # a=1 without --publish is a usage error too
]

# everything else on the command line is good, so the one bad value is what fails
GOOD = {
    "demo": ["{base}/demo-out", "--points", "100", "--weeks", "1", "--stations", "1", "--no-faults"],
    "survey": ["{src}", "-o", "{base}/survey.parquet", "-q"],
    "migrate": ["{src}", "{base}/shelf-m", "--crs", factory.SITE_CRS, "-q", "--no-previews"],
    "grid": ["{shelf}", "--station", "north"],
    "change": ["{shelf}", "--station", "north", "--from", "2026-09-01", "--to", "2026-09-02", "-o", "{base}/c.png"],
    "catalog": ["{shelf}"],
    "verify": ["{shelf}", "--quick"],
    "publish": ["{shelf}", "{base}/published", "--dry-run"],
    "find": ["{shelf}"],
    "extract": ["{shelf}", "--bbox-fraction", "0.5", "-o", "{base}/cut.parquet", "-q"],
    "report": ["{shelf}", "-o", "{base}/r.html", "-q"],
    "watch": ["{src}", "{base}/shelf-w", "--rounds", "1", "--crs", factory.SITE_CRS, "-q", "--no-report"],
}


def _args(command: str, option: str, value: str, world: dict[str, str]) -> list[str]:
    """The good command line with ``option`` set to the bad ``value`` (arguments replaced in place)."""
    fill = lambda text: text.format(**world)  # noqa: E731
    good = [fill(a) for a in GOOD[command]]
    params = {p.name: p for p in cli.commands[command].params}
    arguments = [p for p in cli.commands[command].params if isinstance(p, click.Argument)]
    bad = fill(value).split(" ") if option == "--bbox" or " --" in value else [fill(value)]
    if option.isupper():
        index = [a.name.upper() for a in arguments].index(option)
        return good[:index] + bad + good[index + 1 :]
    opt = next(p for p in params.values() if option in p.opts)
    rest, i = [], len(arguments)
    rest = good[:i]
    tail = good[i:]
    # drop the good value of the same option, then put the bad one last
    j = 0
    kept = []
    while j < len(tail):
        if tail[j] in opt.opts:
            j += 1 + (opt.nargs if not opt.is_flag else 0)
            continue
        kept.append(tail[j])
        j += 1
    if option in ("--bbox", "--bbox-crs", "--crs") and command == "extract":
        kept = [k for k in kept]  # --bbox-fraction stays: the bad value must fail on its own
    if option == "--bbox" and command == "extract":
        kept = _without(kept, "--bbox-fraction", 1)
    return rest + kept + [option] + bad


def _without(args: list[str], option: str, nargs: int) -> list[str]:
    if option not in args:
        return args
    i = args.index(option)
    return args[:i] + args[i + 1 + nargs :]


CASES = [(c, o, v, code) for c, o, values, code in TABLE for v in values]


@pytest.mark.parametrize(("command", "option", "value", "code"), CASES,
                         ids=[f"{c} {o} {v!r}" for c, o, v, _ in CASES])
def test_a_bad_value_is_a_clear_error(world, command, option, value, code) -> None:
    args = [command, *_args(command, option, value, world)]
    result = CliRunner().invoke(cli, args)
    text = result.output
    assert result.exit_code == code, f"{args}: exit {result.exit_code}\n{text}"
    assert result.exception is None or isinstance(result.exception, SystemExit), (args, repr(result.exception))
    assert "Traceback" not in text
    assert ("Error" in text or "error" in text), text  # one readable line, not silence


def test_the_table_covers_every_option() -> None:
    """Every argument and every option that takes a value of every command has rows in TABLE."""
    covered = {(c, o) for c, o, _, _ in TABLE}
    missing = []
    for name, command in cli.commands.items():
        for p in command.params:
            if isinstance(p, click.Option) and (p.is_flag or p.count or p.name == "help"):
                continue
            label = p.name.upper() if isinstance(p, click.Argument) else max(p.opts, key=len)
            if (name, label) not in covered:
                missing.append(f"{name} {label}")
    assert not missing, missing


def test_the_good_command_lines_work(world) -> None:
    """The table's base command lines succeed, so each failure above is the bad value's doing."""
    for command in ("find", "verify", "publish", "extract"):
        args = [command, *[a.format(**world) for a in GOOD[command]]]
        result = CliRunner().invoke(cli, args)
        assert result.exit_code == 0, (args, result.output)


@pytest.mark.parametrize("args", [
    ["survey", "{src}", "--crs", "EPSG:99999999"],
    ["migrate", "{src}", "{blocked}", "--crs", factory.SITE_CRS, "-q"],
    ["find", "{shelf}", "--bbox-crs", "foo", "--bbox", "0", "0", "1", "1"],
])
def test_the_installed_script_prints_no_traceback(world, args) -> None:
    """The same through the real ``scanshelf`` entry point in a fresh process."""
    env = dict(os.environ, PYTHONPATH=str(ROOT))
    run = subprocess.run([sys.executable, "-c", "from archive.cli import main; main()", *[a.format(**world) for a in args]],
                         capture_output=True, text=True, env=env, timeout=300)
    assert run.returncode == 2, run.stderr
    assert "Traceback" not in run.stdout + run.stderr
    assert "error" in run.stderr.lower()


def _example_boxes() -> list[tuple[str, tuple[float, ...], str | None]]:
    """Every bounding box in README.md and in every command's --help: (where, box, its CRS option)."""
    import re

    texts = {"README.md": (ROOT / "README.md").read_text(encoding="utf-8")}
    texts["scanshelf --help"] = CliRunner().invoke(cli, ["--help"]).output
    for name in cli.commands:
        texts[f"scanshelf {name} --help"] = CliRunner().invoke(cli, [name, "--help"]).output
    number = r"(-?\d+(?:\.\d+)?)"
    boxes = []
    for where, text in texts.items():
        for line in text.replace("\\\n", " ").splitlines():
            for m in re.finditer(rf"--bbox {number} {number} {number} {number}", line):
                crs = re.search(r"--bbox-crs (\S+)", line)
                boxes.append((where, tuple(map(float, m.groups())), crs.group(1) if crs else None))
            for m in re.finditer(rf"bbox=\({number}, {number}, {number}, {number}\)", line):
                boxes.append((where, tuple(map(float, m.groups())), None))
    return boxes


def test_example_boxes_hit_the_demo_site(tmp_path) -> None:
    """A newcomer who copies an example box onto the demo shelf gets scans, not "no scans match"."""
    import laspy
    from pyproj import Transformer

    from archive.demo import make_demo

    make_demo(tmp_path / "demo", points_per_scan=300, weeks=1, faults=False)
    lo, hi = [float("inf")] * 2, [float("-inf")] * 2
    for path in [*(tmp_path / "demo/source").rglob("*.la[sz]"), *(tmp_path / "demo/source").rglob("*.LA[SZ]")]:
        header = laspy.read(path).header  # reference: laspy reads each file's bounds
        lo = [min(lo[i], header.mins[i]) for i in range(2)]
        hi = [max(hi[i], header.maxs[i]) for i in range(2)]
    boxes = _example_boxes()
    assert len(boxes) >= 6, boxes  # README (4) and the find, extract and group --help
    for where, (xmin, ymin, xmax, ymax), crs in boxes:
        if crs is not None:  # reference: pyproj maps the box into the demo's EPSG:32633
            xmin, ymin, xmax, ymax = Transformer.from_crs(crs, "EPSG:32633", always_xy=True).transform_bounds(
                xmin, ymin, xmax, ymax)
        assert xmin < hi[0] and xmax > lo[0] and ymin < hi[1] and ymax > lo[1], (where, (xmin, ymin, xmax, ymax), lo, hi)


def test_the_example_site_file_shows_every_field() -> None:
    """examples/site.toml names every field of catalog_schema/site.schema.json (set or as a comment)."""
    import json
    import re

    schema = json.loads((ROOT / "catalog_schema/site.schema.json").read_text())
    text = (ROOT / "examples/site.toml").read_text()
    names: set[str] = set()

    def walk(node: dict) -> None:
        for key, sub in node.get("properties", {}).items():
            names.add(key)
            walk(sub)
        for sub in (node.get("additionalProperties"), node.get("items")):
            if isinstance(sub, dict):
                walk(sub)

    walk(schema)
    missing = sorted(n for n in names if not re.search(rf"(^|[\s\[.#]){re.escape(n)}\b", text, re.M))
    assert not missing, missing


def test_every_command_spells_its_options_the_same() -> None:
    """-s/--storage-option KEY=VALUE wherever storage options are taken; --bbox-crs for the box's CRS."""
    import re

    for name, command in cli.commands.items():
        text = re.sub(r"\s+", " ", CliRunner().invoke(cli, [name, "--help"]).output)
        takes_options = any(p.name == "storage_options" for p in command.params)
        assert ("-s, --storage-option KEY=VALUE" in text) == takes_options, name
        if name in ("find", "extract"):
            assert "--bbox-crs CRS" in text and " --crs " not in text, name
        if name in ("survey", "migrate", "watch"):
            assert "--crs CRS" in text and "--bbox-crs" not in text, name
    watch = re.sub(r"\s+", " ", CliRunner().invoke(cli, ["watch", "--help"]).output)
    assert "-p, --publish-option KEY=VALUE" in watch  # the destination's options, apart from the source's
