"""`scanshelf publish`: copy a shelf to object storage or a web root."""

from __future__ import annotations

import sys

import click

from archive.cli import params
from archive.cli.common import silence_warnings, storage_option
from archive.publish import RETRIES


@click.command("publish")
@click.argument("shelf", type=params.URL)
@click.argument("dest", type=params.URL)
@storage_option(help="fsspec storage option for DEST (repeatable), e.g. endpoint_url=https://s3.example.org. "
                     "Credentials are best left to the environment; values are never printed or written.")
@click.option("--dry-run", is_flag=True, help="List what would be uploaded; write nothing.")
@click.option("--workers", default=8, show_default=True, type=click.IntRange(1, 256), help="Parallel transfers.")
@click.option("--no-verify", is_flag=True, help="Check sizes only after upload, not checksums.")
@click.option("--rehash", is_flag=True, help="Hash same-size remote files instead of trusting the last manifest.")
@click.option("--retries", default=RETRIES, show_default=True, type=click.IntRange(min=1),
              help="Attempts per file (upload and read-back) before it is reported missing; "
                   "the wait doubles from 0.5 s between attempts.")
@click.option("-q", "--quiet", is_flag=True, help="No progress bar, no warnings and no summary line.")
def publish(shelf: str, dest: str, storage_options: tuple[tuple[str, object], ...], dry_run: bool, workers: int,
            no_verify: bool, rehash: bool, retries: int, quiet: bool) -> None:
    """Copy the shelf SHELF to DEST (s3://, gs://, az://, a folder a web server serves, ...).

    Data goes first and catalog.json last, so readers never see a half-published shelf.
    Files already at DEST with the same size and SHA-256 are skipped: re-running after an
    interruption resumes. The ledger stays local. Credentials come from the environment,
    an fsspec config file or --storage-option, and are never written anywhere.

    \b
    Example:
      export AWS_ACCESS_KEY_ID=... AWS_SECRET_ACCESS_KEY=...
      scanshelf publish ./shelf s3://survey-data/site-a --dry-run
      scanshelf publish ./shelf s3://survey-data/site-a -s endpoint_url=https://s3.example.org
    """
    from tqdm import tqdm

    from archive.publish import PublishError
    from archive.publish import publish as run

    if quiet:
        silence_warnings()
    options = params.storage_options(storage_options, dest)
    with tqdm(unit="B", unit_scale=True, desc="publish", disable=dry_run or quiet or None, file=sys.stderr) as bar:
        try:
            report = run(shelf, dest, options, dry_run=dry_run, workers=workers, verify=not no_verify,
                         rehash=rehash, retries=retries, progress=bar.update)
        except PublishError as e:
            click.echo(f"scanshelf: error: {e}", err=True)
            sys.exit(2 if e.permanent else 1)
    if dry_run:
        for entry in report.files:
            if entry.action == "upload":
                click.echo(f"upload  {entry.size:>14,}  {entry.path}")
    if not quiet or dry_run:
        click.echo(str(report))
