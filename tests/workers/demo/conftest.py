"""Archives shared by the demo tests: one tiny archive with every injected error, one clean."""

from __future__ import annotations

from pathlib import Path

import pytest

from demaudit.workers.demo.archive import clean_options, make_demo_archive
from demaudit.workers.demo.grids import Egm96Geoid
from demaudit.workers.demo.options import DemoArchiveOptions
from tests.support.demo_files import TINY


@pytest.fixture(scope="package")
def archive(tmp_path_factory: pytest.TempPathFactory) -> Path:
    out = tmp_path_factory.mktemp("demo") / "archive"
    make_demo_archive(out, DemoArchiveOptions(**TINY, void_patches=20))
    return out


@pytest.fixture(scope="package")
def clean_archive(tmp_path_factory: pytest.TempPathFactory) -> Path:
    out = tmp_path_factory.mktemp("clean") / "archive"
    make_demo_archive(out, clean_options(**TINY))
    return out


@pytest.fixture(scope="package")
def geoid() -> Egm96Geoid:
    return Egm96Geoid()
