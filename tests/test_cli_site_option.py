"""``--site FILE`` names the site file; the old spelling ``--recipe`` is accepted for one release."""

from pathlib import Path

import click
from click.testing import CliRunner

from archive.cli.common import site_option


@click.command()
@site_option
def echo_site(site_file: str | None) -> None:
    click.echo(f"site={site_file}")


def test_site_option_passes_the_file(tmp_path: Path) -> None:
    f = tmp_path / "site.toml"
    f.write_text("")
    out = CliRunner().invoke(echo_site, ["--site", str(f)])
    assert out.exit_code == 0 and out.output == f"site={f}\n"
    assert "--site FILE" in CliRunner().invoke(echo_site, ["--help"]).output


def test_recipe_spelling_is_deprecated_but_still_works(tmp_path: Path) -> None:
    f = tmp_path / "site.toml"
    f.write_text("")
    out = CliRunner().invoke(echo_site, ["--recipe", str(f)])
    assert out.exit_code == 0
    assert f"site={f}" in out.stdout
    assert "--recipe is deprecated" in out.stderr and "--site" in out.stderr
    assert "--recipe" not in CliRunner().invoke(echo_site, ["--help"]).output
