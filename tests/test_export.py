"""Export: a netCDF file that the IOOS compliance checker's CF suite accepts, and the point table as CSV.

The store is a real Zarr store written through ResultStore with invented values (one per layout
variable, derived from the point's position); the simulation is tested elsewhere.
"""

from __future__ import annotations

import json
import subprocess
import sys
import tomllib
from pathlib import Path

import netCDF4
import numpy as np
import pytest
from compliance_checker.runner import CheckSuite, ComplianceChecker
from typer.testing import CliRunner

from capsweep.axes import key_axis
from capsweep.results_schema.attrs import CF_CONVENTIONS
from capsweep.results_schema.layout import VARIABLES, GridSpec
from capsweep.results_schema.store import ResultStore, create_store
from capsweep.sweeps.cli import app

# A text axis, a count axis given out of order and a bool axis: none may be a CF coordinate variable as is.
AXES = (key_axis("imprint", "assemblies.imprint", ("prewired", "learned")),
        key_axis("n_odours", "assemblies.count", (3, 1, 2)),
        key_axis("inhibitory_stdp", "plasticity.inhibitory.enabled", (True, False)))
SHAPE = (2, 3, 2, 2)
SEEDS = np.arange(np.prod(SHAPE), dtype=np.int64).reshape(SHAPE) + 2**40  # beyond int32 on purpose
FAILED, PENDING = (0, 1, 0, 1), (1, 2, 1, 0)


def invented_result(number: int) -> dict:
    """One value per layout variable: flags their first label, integers ``number``, floats ``number / 10``."""
    result: dict = {}
    for var in VARIABLES:
        if var.name == "seed":
            continue
        value = var.flags[0] if var.flags else number if var.dtype.startswith("int") else number / 10
        result[var.name] = value if var.inner is None else [value] if var.flags else np.full(1, value)
    return result


@pytest.fixture(scope="module")
def store(tmp_path_factory: pytest.TempPathFactory) -> Path:
    path = tmp_path_factory.mktemp("export") / "odour.zarr"
    ids = np.array([f"odour-{i:02d}" for i in range(np.prod(SHAPE))], dtype=object).reshape(SHAPE)
    create_store(path, GridSpec(AXES, SHAPE[-1], 3, 2, 10, 0.5, "fp", {"sweep_name": "odour-export",
                                                                        "replicates": SHAPE[-1]}), ids, SEEDS)
    writer = ResultStore.open(path)
    for number, index in enumerate(np.ndindex(*SHAPE)):
        if index == FAILED:
            writer.write_failure(index, "RuntimeError: worker lost\nTraceback (most recent call last): ...")
        elif index != PENDING:
            writer.write_point(index, invented_result(number))
    return path


@pytest.fixture(scope="module")
def exported(store: Path, tmp_path_factory: pytest.TempPathFactory) -> Path:
    path = tmp_path_factory.mktemp("netcdf") / "new" / "dir" / "odour.nc"  # folders that do not exist yet
    shown = CliRunner().invoke(app, ["export", str(store), "--netcdf", str(path)])
    assert shown.exit_code == 0, shown.output
    return path


def test_netcdf_passes_the_cf_compliance_checker_at_every_priority(exported: Path, tmp_path: Path) -> None:
    """IOOS compliance-checker, CF suite (cf:1.11, strict criteria): no failed check at high ("must fix"),
    medium or low priority, and no check that raised inside the checker."""
    CheckSuite.load_all_available_checkers()
    report = tmp_path / "report.json"
    _, checker_errors = ComplianceChecker.run_checker(str(exported), ["cf:1.11"], 0, "strict",
                                                      output_filename=str(report), output_format="json")
    results = json.loads(report.read_text())["cf:1.11"]
    for level in ("high_priorities", "medium_priorities", "low_priorities"):
        assert [(r["name"], r["msgs"]) for r in results[level] if r["msgs"]] == [], level
    assert not checker_errors


def test_netcdf_holds_the_store_values_with_their_dtypes(exported: Path) -> None:
    with netCDF4.Dataset(exported) as nc:
        assert nc.Conventions == CF_CONVENTIONS and "odour-export" in nc.title
        history = nc.history.splitlines()
        assert len(history) == 2 and history[0].endswith("store created") and "capsweep export" in history[1]
        assert json.loads(nc.sweep_axes) == ["imprint", "n_odours", "inhibitory_stdp"]
        assert list(nc["imprint_value"][:]) == ["prewired", "learned"] and list(nc["imprint"][:]) == [0, 1]
        assert list(nc["n_odours_value"][:]) == [3, 1, 2]
        outcome = nc["outcome"]
        assert outcome.dtype == np.int8 and outcome.flag_values.dtype == np.int8
        assert outcome.flag_meanings == "stable runaway silent"
        np.testing.assert_array_equal(nc["seed"][:], SEEDS)
        done = (0, 0, 0, 1)
        assert nc["recalled_count"].dtype == np.int32 and nc["recalled_count"][done] == 1  # point number 1
        assert np.ma.is_masked(nc["recalled_count"][PENDING]) and np.ma.is_masked(nc["recalled_count"][FAILED])
        assert nc["error"][FAILED].startswith("RuntimeError: worker lost") and nc["error"][done] == ""
        assert nc["point_id"][PENDING] == f"odour-{np.ravel_multi_index(PENDING, SHAPE):02d}"
        assert nc["weight_in"].units == "1" and nc["weight_in"].relative_to == "g_leak"


def test_export_never_overwrites_a_file(store: Path, exported: Path, tmp_path: Path) -> None:
    before = exported.read_bytes()
    shown = CliRunner().invoke(app, ["export", str(store), "--netcdf", str(exported)])
    assert shown.exit_code != 0 and "Traceback" not in shown.output and shown.output.count("\n") == 1
    assert str(exported) in shown.stderr and "already exists" in shown.stderr
    assert exported.read_bytes() == before
    assert not list(exported.parent.glob("*.partial"))


def test_csv_export_has_every_point_with_units(store: Path, tmp_path: Path) -> None:
    path = tmp_path / "points.csv"
    assert CliRunner().invoke(app, ["export", str(store), "--csv", str(path)]).exit_code == 0
    lines = path.read_text().splitlines()
    assert len(lines) == 1 + np.prod(SHAPE)
    header = lines[0].split(",")
    assert header[:6] == ["imprint", "n_odours", "inhibitory_stdp", "replicate", "point_id", "status"]
    assert "wall_time_s" in header and "recalled_count" in header


def test_netcdf_export_needs_nothing_beyond_the_plain_install(store: Path, tmp_path: Path) -> None:
    """--netcdf needed the netCDF4 package, which the README's plain install leaves out: with netCDF4 made
    unimportable the export still writes a file that netCDF4 (the format's reference library) reads back."""
    path = tmp_path / "new" / "dir" / "x.nc"
    code = ("import sys; sys.modules['netCDF4'] = None\n"
            "from capsweep.sweeps.cli import main\n"
            f"sys.argv = ['capsweep', 'export', {str(store)!r}, '--netcdf', {str(path)!r}]\nmain()")
    proc = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=300)
    assert proc.returncode == 0, proc.stderr
    with netCDF4.Dataset(path) as nc:
        np.testing.assert_array_equal(nc["seed"][:], SEEDS)


def test_a_file_system_fault_is_one_line_and_the_other_file_is_still_written(store: Path, tmp_path: Path) -> None:
    """A folder that could not be made gave a 46-78-line traceback ending in a misleading PermissionError on
    '.partial', and the --csv of the same command was not written."""
    blocker = tmp_path / "a_file"
    blocker.write_text("not a folder")
    csv = tmp_path / "out" / "points.csv"
    shown = CliRunner().invoke(app, ["export", str(store), "--netcdf", str(blocker / "x.nc"), "--csv", str(csv)])
    assert shown.exit_code != 0
    errors = shown.stderr.strip().splitlines()
    assert len(errors) == 1 and errors[0].startswith("capsweep: error: --netcdf") and str(blocker) in errors[0]
    assert "partial" not in shown.stderr and "Traceback" not in shown.output
    assert len(csv.read_text().splitlines()) == 1 + np.prod(SHAPE)


def test_examples_copy_into_a_folder_that_does_not_exist_yet(tmp_path: Path) -> None:
    """`plot --out` created its folder; `examples --to` refused one that did not exist."""
    target = tmp_path / "new" / "dir"
    shown = CliRunner().invoke(app, ["examples", "demo", "--to", str(target)])
    assert shown.exit_code == 0, shown.output
    assert tomllib.loads((target / "demo.toml").read_text())["sweep"]["name"]
