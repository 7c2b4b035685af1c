"""`scanshelf publish`: copy a shelf to object storage or a web root."""

from __future__ import annotations

import sys

import click

from archive.cli.common import parse_storage_options
from archive.publish import RETRIES

STORAGE_OPTION_HELP = (
    "fsspec storage option KEY=VALUE (repeatable), e.g. endpoint_url=https://s3.example.org. "
    "Values are never printed or written."
)


@click.command("publish")
@click.argument("shelf")
@click.argument("dest")
@click.option("--storage-option", "-s", "storage_option", multiple=True, help=STORAGE_OPTION_HELP)
@click.option("--dry-run", is_flag=True, help="List what would be uploaded; write nothing.")
@click.option("--workers", default=8, show_default=True, help="Parallel transfers.")
@click.option("--no-verify", is_flag=True, help="Check sizes only after upload, not checksums.")
@click.option("--rehash", is_flag=True, help="Hash same-size remote files instead of trusting the last manifest.")
@click.option("--retries", default=RETRIES, show_default=True, type=click.IntRange(min=1),
              help="Attempts per file (upload and read-back) before it is reported missing; "
                   "the wait doubles from 0.5 s between attempts.")
@click.option("-q", "--quiet", is_flag=True, help="No progress bar and no summary line.")
def publish(shelf: str, dest: str, storage_option: tuple[str, ...], dry_run: bool, workers: int,
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

    options = parse_storage_options(storage_option)
    with tqdm(unit="B", unit_scale=True, desc="publish", disable=dry_run or quiet or None, file=sys.stderr) as bar:
        try:
            report = run(shelf, dest, options, dry_run=dry_run, workers=workers, verify=not no_verify,
                         rehash=rehash, retries=retries, progress=bar.update)
        except PublishError as e:
            raise click.ClickException(str(e)) from None
    if dry_run:
        for entry in report.files:
            if entry.action == "upload":
                click.echo(f"upload  {entry.size:>14,}  {entry.path}")
    if not quiet or dry_run:
        click.echo(str(report))
