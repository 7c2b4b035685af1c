"""Shared fixtures: a small hand-made source and its migrated shelf (built once per session)."""

from __future__ import annotations

import os
from pathlib import Path

import pytest
from hypothesis import settings

from tests import factory

IN_CI = os.environ.get("CI", "").lower() == "true"

# In CI every run tries the same examples, so a red run can be repeated; locally they vary and
# keep finding new cases (add each one that fails as an explicit @example).
settings.register_profile("ci", derandomize=True, database=None)
if IN_CI:
    settings.load_profile("ci")


@pytest.fixture(scope="session")
def small_source(tmp_path_factory) -> tuple[Path, dict[str, int]]:
    root = tmp_path_factory.mktemp("source")
    return root, factory.small_source(root)


@pytest.fixture(scope="session")
def small_shelf(small_source, tmp_path_factory):
    from archive.migrate import migrate

    root, expected = small_source
    shelf = tmp_path_factory.mktemp("shelf")
    result = migrate(str(root), str(shelf), crs=factory.SITE_CRS)
    return shelf, result, expected
