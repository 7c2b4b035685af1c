"""`scanshelf report` and `scanshelf watch`: the health page, and keeping a shelf up to date."""

from __future__ import annotations

import json

import click

from archive.cli import params
from archive.cli.common import crs_option, silence_warnings, site_option, storage_option


@click.command("report")
@click.argument("shelf", type=params.URL)
@click.option("-o", "--output", default="report.html", show_default=True, type=params.OutputFile(".html", ".htm"),
              help="HTML file to write (any fsspec URL; local files are written atomically).")
@storage_option(help="fsspec storage option for reading SHELF (repeatable), e.g. anon=true.")
@click.option("--gap-factor", default=1.5, show_default=True, type=params.FiniteRange(min=1.0, max=1e6),
              help="An interval longer than this many median intervals of a station counts as a gap.")
@click.option("-q", "--quiet", is_flag=True, help="Print nothing on success, and no warnings.")
@click.option("--json", "as_json", is_flag=True, help="Print the result as one JSON object (for scripts).")
def report_command(shelf: str, output: str, storage_options: tuple[tuple[str, object], ...], gap_factor: float,
                   quiet: bool, as_json: bool) -> None:
    """Write a one-page health report of the shelf SHELF (a folder or a URL) as HTML.

    Per station: scans over time with gaps marked, points per scan, the latest elevation
    map, point density, elevation change over the last interval and over the whole record,
    and the problems found by the survey and the migration. The page is self-contained
    (pictures embedded, no scripts), works offline and prints cleanly.

    \b
    Examples:
      scanshelf report ./shelf -o shelf-health.html
      scanshelf report ./shelf -o ./shelf/index.html      # the page publish puts at the root
      scanshelf report https://data.example.org/site-a -o site-a.html --json
    """
    from archive.report import build_report

    if quiet or as_json:
        silence_warnings()
    result = build_report(shelf, output, params.storage_options(storage_options, shelf), gap_factor=gap_factor)
    if as_json:
        click.echo(json.dumps(result.__dict__))
    elif not quiet:
        click.echo(result.summary())


@click.command("watch")
@click.argument("source", type=params.URL)
@click.argument("shelf", type=click.Path(file_okay=False))
@click.option("--publish", "publish_to", metavar="DEST", type=params.URL, help="Publish the shelf to DEST after every round.")
@click.option("--every", default="10m", show_default=True, help="Time between round starts: 30s, 10m, 1h, 1h30m.")
@click.option("--rounds", type=click.IntRange(min=1), help="Stop after this many rounds (default: run until Ctrl-C).")
@site_option
@crs_option
@click.option("--salvage", is_flag=True, help="Convert the readable points of damaged files.")
@click.option("--no-report", is_flag=True, help="Do not keep the shelf's index.html health page up to date.")
@storage_option(help="fsspec storage option for reading SOURCE (repeatable), e.g. anon=true.")
@click.option("-p", "--publish-option", "publish_option", multiple=True, metavar=params.KEY_VALUE,
              type=params.KEY_VALUE_PAIR,
              help="fsspec storage option for the --publish DEST (repeatable), e.g. endpoint_url=https://s3.example.org. "
                   "Credentials are best left to the environment.")
@click.option("-q", "--quiet", is_flag=True, help="Print only rounds with new scans, failures or errors; no warnings.")
@click.option("--json", "as_json", is_flag=True, help="Print one JSON object per round (JSON Lines).")
def watch_command(source: str, shelf: str, publish_to: str | None, every: str, rounds: int | None,
                  site_file: str | None, crs: str | None, salvage: bool, no_report: bool,
                  storage_options: tuple[tuple[str, object], ...], publish_option: tuple[tuple[str, object], ...],
                  quiet: bool,
                  as_json: bool) -> None:
    """Keep SHELF up to date with SOURCE: migrate new files on a schedule, and publish.

    Every round converts only new or changed source files (the ledger remembers the rest),
    refreshes the shelf's index.html, and with --publish uploads what changed. Bad files are
    recorded and skipped; an unreachable source or destination is logged and retried next
    round. Each round prints one line: round, new scans, failed files, published files, time.
    Ctrl-C stops cleanly between steps.

    \b
    Examples:
      scanshelf watch ./incoming ./shelf --every 10m --crs EPSG:32633
      scanshelf watch ./incoming ./shelf --publish s3://survey-data/site-a --every 1h
      scanshelf watch ./incoming ./shelf --rounds 1 --json      # one round, for cron
    """
    from archive.migrate import MigrateOptions
    from archive.watch import parse_duration, watch

    try:
        interval = parse_duration(every)
    except ValueError as exc:
        raise click.BadParameter(str(exc), param_hint="--every") from None

    def show(one) -> None:
        if as_json:
            click.echo(json.dumps(one.to_dict()))
        elif not quiet or one.new_scans or one.new_failed or one.errors:
            click.echo(one.line())

    if publish_option and not publish_to:
        raise click.UsageError("-p/--publish-option is for the --publish DEST; give --publish too")
    if quiet or as_json:
        silence_warnings()
    options = MigrateOptions(salvage=salvage, storage_options=params.storage_options(storage_options, source))
    result = watch(source, shelf, interval, publish_to, rounds, site_file, crs, options=options,
                   publish_options=params.storage_options(publish_option, publish_to, "-p/--publish-option"),
                   report=not no_report, on_round=show)
    if result.interrupted and not as_json:
        click.echo(f"stopped after {len(result.rounds)} round(s)", err=True)
