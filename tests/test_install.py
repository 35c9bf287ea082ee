"""The installed distribution: one import root, usable from any directory, no generic top-level names.

Subprocesses run in temporary directories outside the checkout, where ``python -c`` puts the
current directory first on ``sys.path``: a user's own ``sweeps.py`` there must not hide capsweep's.
"""

from __future__ import annotations

import importlib.metadata
import subprocess
import sys
import tomllib
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
PYPROJECT = tomllib.loads((ROOT / "pyproject.toml").read_text())


def _python(code: str, cwd: Path) -> subprocess.CompletedProcess[str]:
    return subprocess.run([sys.executable, "-c", code], cwd=cwd, capture_output=True, text=True, timeout=120)


def test_the_distribution_exposes_only_capsweep() -> None:
    assert importlib.metadata.distribution("capsweep").read_text("top_level.txt").split() == ["capsweep"]


def test_every_package_folder_is_packaged() -> None:
    """A subpackage missing from [tool.setuptools] packages works in an editable install but not from a wheel."""
    setup = PYPROJECT["tool"]["setuptools"]
    on_disk = {".".join([package, *init.parent.relative_to(ROOT / folder).parts])
               for package, folder in setup["package-dir"].items() for init in (ROOT / folder).rglob("__init__.py")}
    missing = sorted(on_disk - set(setup["packages"]))
    assert not missing, f"pyproject.toml [tool.setuptools] packages lacks {missing}: a wheel would not contain them"


def test_imports_work_from_outside_the_checkout_beside_a_users_own_modules(tmp_path: Path) -> None:
    (tmp_path / "sweeps.py").write_text("OWN = 1\n")  # a user's own files of the generic names
    (tmp_path / "runners.py").write_text("OWN = 2\n")
    ok = _python("import capsweep, capsweep.sweeps.query, capsweep.runners.builds; print(capsweep.__version__)",
                 tmp_path)
    assert ok.returncode == 0, ok.stderr
    assert ok.stdout.strip() == PYPROJECT["project"]["version"]
    shadowed = _python("import sweeps.query", tmp_path)
    assert "ModuleNotFoundError: No module named 'sweeps.query'; 'sweeps' is not a package" in shadowed.stderr


def test_no_generic_top_level_package_is_installed(tmp_path: Path) -> None:
    for module in ("runners.point", "sweeps.query", "results_schema.layout"):
        result = _python(f"import {module}", tmp_path)
        top = module.partition(".")[0]
        assert f"ModuleNotFoundError: No module named '{top}'" in result.stderr, (module, result.stderr)


def test_console_script_runs_from_outside(tmp_path: Path) -> None:
    script = Path(sys.executable).with_name("capsweep")
    result = subprocess.run([str(script), "--help"], cwd=tmp_path, capture_output=True, text=True, timeout=120)
    assert result.returncode == 0, result.stderr
    assert "Usage: capsweep" in result.stdout and "capacity" in result.stdout
