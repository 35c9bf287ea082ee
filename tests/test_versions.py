"""Versions: one capsweep version across the package, `capsweep --version`, the README and the CHANGELOG; every
point records the capsweep that wrote it; the CHANGELOG's schema history covers every readable schema."""

from __future__ import annotations

import importlib.metadata
from pathlib import Path

import numpy as np
import zarr
from test_store import make_store, point_result
from typer.testing import CliRunner

import capsweep
from capsweep.results_schema import layout
from capsweep.results_schema.store import ResultStore
from capsweep.sweeps.cli import app

ROOT = Path(__file__).parent.parent


def test_the_version_is_one_in_the_package_the_cli_the_readme_and_the_changelog() -> None:
    version = importlib.metadata.version("capsweep")
    assert capsweep.__version__ == version
    shown = CliRunner().invoke(app, ["--version"])
    assert shown.exit_code == 0 and shown.stdout.strip() == version
    readme = (ROOT / "README.md").read_text()
    assert f"capsweep {version}, store schema {layout.SCHEMA_VERSION}" in readme
    changelog = (ROOT / "CHANGELOG.md").read_text()
    assert f"\n## {version}\n" in changelog
    history = changelog[changelog.index("## Store schema history"):]
    for schema in layout.READABLE:
        assert f"\n| {schema} |" in history, f"schema {schema} missing from the CHANGELOG's schema history"


def test_each_point_records_the_capsweep_that_wrote_it(tmp_path: Path) -> None:
    path = make_store(tmp_path)
    with ResultStore.open(path) as store:
        store.write_point((0, 0, 0, 0), point_result(1, 1))
        store.write_failure((1, 0, 0, 0), "no spikes")
        store.mark_unneeded([(2, 0, 0, 1)])
    writers = np.asarray(zarr.open_array(path / layout.WRITER_VERSION, mode="r")[...])
    version = importlib.metadata.version("capsweep")
    assert [writers[0, 0, 0, 0], writers[1, 0, 0, 0], writers[2, 0, 0, 1]] == [version] * 3
    assert (writers == "").sum() == writers.size - 3, "a point nobody wrote names no writer"
