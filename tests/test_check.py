"""The commands that look at sweep files without running them: check, keys, examples, --version, help texts.

Also the plausibility warnings (allowed values that look like a unit slip) and the README's key table,
which must match the registry.
"""

from __future__ import annotations

import subprocess
import sys
import tomllib
from pathlib import Path

import pytest
from typer.testing import CliRunner, Result

from capsweep.sweeps.cli import app
from capsweep.sweeps.reference import with_key_section

ROOT = Path(__file__).resolve().parents[1]

SWEEP = """
[sweep]
name = "odour-check"
store = "odours.zarr"
replicates = 2
[[sweep.axis]]
name = "n_exc"
key = "network.n_exc"
values = [200, 300]
[[sweep.axis]]
name = "beta"
key = "plasticity.heterosynaptic.beta"
values = [0.01, 0.03, 0.05]
[assemblies]
count = 2
size = 40
[protocol]
settle_s = 1.0
hold_s = 4.0
"""


def invoke(*args: str) -> Result:
    return CliRunner().invoke(app, list(args))


def write(tmp_path: Path, text: str, name: str = "odours.toml") -> Path:
    path = tmp_path / name
    path.write_text(text)
    return path


def test_check_shows_the_grid_builds_and_simulated_time(tmp_path: Path) -> None:
    result = invoke("check", str(write(tmp_path, SWEEP)))
    assert result.exit_code == 0, result.output
    assert "12 points: n_exc 2 x beta 3 x 2 replicates" in result.stdout  # 2 x 3 x 2
    assert "  n_exc: 200, 300" in result.stdout and "  beta: 0.01, 0.03, 0.05" in result.stdout
    # Two network sizes compile two standalone builds; beta is a per-run constant (runners/builds.py).
    assert "distinct network builds: 2" in result.stdout
    # Per point: settle 1 + hold 4 + 2 cues x (0.2 s cue + 0.5 s gap) + the tail that completes
    # runaway_hold_s + smoothing_s (1 + 0.5 s) after the last cue (1.5 - 0.5 s) = 7.4 s (registry defaults); 12 points.
    assert "simulated time in all: 1 min 29 s" in result.stdout  # 12 x 7.4 s = 88.8 s
    # each build named with its engine (standalone expresses these settings: no fallback)
    assert "  build n_exc=200 (6 points): standalone engine, which compiles one binary" in result.stdout
    assert "  build n_exc=300 (6 points): standalone engine" in result.stdout and "instead of" not in result.stdout
    assert not (tmp_path / "odours.zarr").exists()


def test_check_starts_neither_dask_nor_brian2(tmp_path: Path) -> None:
    """check must be cheap: no cluster and no simulator imported (a fresh process, so nothing is preloaded)."""
    path = write(tmp_path, SWEEP)
    code = ("import sys\nfrom typer.testing import CliRunner\nfrom capsweep.sweeps.cli import app\n"
            f"r = CliRunner().invoke(app, ['check', {str(path)!r}])\n"
            "print(r.exit_code, 'distributed' in sys.modules, 'brian2' in sys.modules)")
    proc = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=120)
    assert proc.stdout.split() == ["0", "False", "False"], proc.stderr


def test_check_names_the_closest_key_for_a_misspelling(tmp_path: Path) -> None:
    path = write(tmp_path, SWEEP.replace("[protocol]", "[plasticity.triplet]\na_lpt = 0.03\n[protocol]"), "demo.toml")
    result = invoke("check", str(path))
    assert result.exit_code == 2
    assert result.stderr == (f"capsweep: error: unknown key plasticity.triplet.a_lpt in {path}; "
                             "did you mean plasticity.triplet.a_ltp?\n")


def test_an_unknown_key_far_from_any_lists_its_table(tmp_path: Path) -> None:
    result = invoke("check", str(write(tmp_path, SWEEP.replace("count = 2", "count = 2\nodour = 1"))))
    assert result.exit_code == 2
    assert "unknown key assemblies.odour" in result.stderr
    assert "valid keys here: assemblies.count, assemblies.size" in result.stderr and "did you mean" not in result.stderr


@pytest.mark.parametrize(
    ("edit", "warned"),
    [
        (("hold_s = 4.0", "hold_s = 7200.0"), "protocol.hold_s = 7200.0"),
        (("hold_s = 4.0", "hold_s = 4.0\ncue_rate_hz = 20000.0"), "protocol.cue_rate_hz = 20000.0"),
        (("values = [200, 300]", "values = [200, 300]\n[[sweep.axis]]\nname = \"hold\"\nkey = \"protocol.hold_s\"\n"
          "values = [4.0, 5000.0]"), "protocol.hold_s = 5000.0"),
        (("hold_s = 4.0", "hold_s = 5000.0\nretention_delays_s = [1.0, 4000.0]"),
         "protocol.retention_delays_s = [1.0, 4000.0]"),
    ],
)
def test_implausible_values_warn_in_one_line_and_do_not_stop(tmp_path: Path, edit: tuple[str, str],
                                                              warned: str) -> None:
    """A value that is allowed but beyond an hour (s) or 10 kHz (total cue rate) looks like a unit slip."""
    result = invoke("check", str(write(tmp_path, SWEEP.replace(*edit))))
    assert result.exit_code == 0, result.output
    lines = [line for line in result.stderr.splitlines() if warned in line]
    assert len(lines) == 1, result.stderr
    assert lines[0].startswith("capsweep: warning: ") and "plausible range" in lines[0] and "quiet_warnings" in lines[0]
    assert "points" in result.stdout


def test_warnings_in_a_variant_name_the_variant(tmp_path: Path) -> None:
    text = SWEEP + '[[sweep.axis]]\nname = "rule"\n[sweep.axis.variants]\nfull = {}\nslow = { "protocol.settle_s" = 4000.0 }\n'
    result = invoke("check", str(write(tmp_path, text)))
    assert result.exit_code == 0, result.output
    assert "protocol.settle_s = 4000.0" in result.stderr and "(variant slow)" in result.stderr


def test_quiet_warnings_silences_only_the_listed_keys(tmp_path: Path) -> None:
    text = SWEEP.replace("hold_s = 4.0", "hold_s = 7200.0\ncue_rate_hz = 20000.0")
    quiet = text.replace("replicates = 2", 'replicates = 2\nquiet_warnings = ["protocol.hold_s"]')
    result = invoke("check", str(write(tmp_path, quiet)))
    assert result.exit_code == 0, result.output
    assert "protocol.hold_s" not in result.stderr and "protocol.cue_rate_hz = 20000.0" in result.stderr
    misspelt = text.replace("replicates = 2", 'replicates = 2\nquiet_warnings = ["protocol.hold"]')
    result = invoke("check", str(write(tmp_path, misspelt)))
    assert result.exit_code == 2 and "did you mean protocol.hold_s?" in result.stderr


def test_plausible_values_do_not_warn(tmp_path: Path) -> None:
    result = invoke("check", str(write(tmp_path, SWEEP.replace("hold_s = 4.0", "hold_s = 3600.0"))))
    assert result.exit_code == 0 and result.stderr == ""


def test_keys_lists_a_table_from_the_registry() -> None:
    result = invoke("keys", "--table", "plasticity.triplet")
    assert result.exit_code == 0, result.output
    paths = [line.split(" = ")[0] for line in result.stdout.splitlines() if not line.startswith(" ")]
    assert paths == ["plasticity.triplet.enabled", "plasticity.triplet.a_ltp", "plasticity.triplet.b_ltd",
                     "plasticity.triplet.tau_plus_ms", "plasticity.triplet.tau_minus_ms",
                     "plasticity.triplet.tau_slow_ms", "plasticity.triplet.w_max"]
    assert "plasticity.triplet.a_ltp = 0.02  [g_leak; a number from 0 to 1]" in result.stdout
    assert "    Triplet LTP amplitude A" in result.stdout


def test_keys_shows_no_unit_for_dimensionless_values() -> None:
    result = invoke("keys", "--table", "assemblies")
    assert "assemblies.count = 4  [an integer from 0 to 1000]" in result.stdout
    assert 'assemblies.overlap = "disjoint"  [one of \'disjoint\', \'random\']' in result.stdout
    assert "[1;" not in result.stdout


def test_keys_refuses_an_unknown_table() -> None:
    result = invoke("keys", "--table", "plasticity.triplt")
    assert result.exit_code == 2
    assert result.stderr == "capsweep: error: --table 'plasticity.triplt' holds no keys; did you mean plasticity.triplet?\n"


def test_readme_key_table_matches_the_registry() -> None:
    readme = (ROOT / "README.md").read_text()
    assert with_key_section(readme) == readme, (
        "README.md's 'Sweep-file keys' table is out of step with capsweep/registry.py; regenerate it with "
        "`python -m capsweep.sweeps.reference README.md`")
    section = readme.split("<!-- keys:start -->")[1].split("<!-- keys:end -->")[0]
    assert "| `protocol.hold_s` | `10.0` | s |" in section  # independent spot check of one row


def test_examples_lists_every_shipped_sweep_file() -> None:
    result = invoke("examples")
    assert result.exit_code == 0, result.output
    listed = {line.split()[0] for line in result.stdout.splitlines()[:-1]}
    configs = ROOT / "configs"
    assert listed == {str(p.relative_to(configs).with_suffix("")) for p in configs.rglob("*.toml")}
    assert "Demo: how many odour memories" in result.stdout


def test_examples_copies_one_and_never_overwrites(tmp_path: Path) -> None:
    result = invoke("examples", "demo", "--to", str(tmp_path))
    assert result.exit_code == 0, result.output
    copied = tmp_path / "demo.toml"
    assert copied.read_bytes() == (ROOT / "configs" / "demo.toml").read_bytes()
    copied.write_text("# mine\n")
    again = invoke("examples", "demo.toml", "--to", str(tmp_path))
    assert again.exit_code == 2
    assert again.stderr.startswith("capsweep: error: ") and again.stderr.count("\n") == 1 and "exists" in again.stderr
    assert copied.read_text() == "# mine\n"
    unknown = invoke("examples", "fruit", "--to", str(tmp_path))
    assert unknown.exit_code == 2 and "examples: " in unknown.stderr and " demo," in unknown.stderr


def test_examples_are_installed_package_data() -> None:
    """The examples ship with the distribution (pyproject package data), not only with a checkout."""
    setup = tomllib.loads((ROOT / "pyproject.toml").read_text())["tool"]["setuptools"]
    assert setup["package-dir"]["capsweep.configs"] == "configs"
    assert "*.toml" in setup["package-data"]["capsweep.configs"]


def test_version_prints_the_package_version() -> None:
    result = invoke("--version")
    assert result.exit_code == 0
    assert result.stdout.strip() == tomllib.loads((ROOT / "pyproject.toml").read_text())["project"]["version"]


def test_run_help_shows_the_sweep_table_name() -> None:
    """Rich markup once swallowed '[sweep]' in the --store help, leaving '(default: .store)'."""
    result = CliRunner().invoke(app, ["run", "--help"], env={"COLUMNS": "200"})
    assert "(default: [sweep].store)" in result.stdout


@pytest.mark.parametrize(("old", "new"), [("plan", "estimate"), ("prune-builds", "shrink-builds"),
                                          ("trim-builds", "shrink-builds")])
def test_renamed_commands_answer_only_to_their_new_names(old: str, new: str) -> None:
    assert invoke(new, "--help").exit_code == 0
    assert invoke(old, "--help").exit_code != 0


def test_shrink_builds_takes_to_mib() -> None:
    """The cache command's option is worded in our own terms (the issue: --max-mib echoed a compiler cache's)."""
    help_text = CliRunner().invoke(app, ["shrink-builds", "--help"], env={"COLUMNS": "200"}).stdout
    assert "--to-mib" in help_text and "--max-mib" not in help_text


def test_check_names_a_fallback_engine_and_its_cost(tmp_path: Path) -> None:
    """A trace bin that is not a whole number of steps forces the cython fallback (minutes of compiling); check
    used not to say so."""
    result = invoke("check", str(write(tmp_path, SWEEP + "[detection]\ntrace_bin_ms = 10.05\n")))
    assert result.exit_code == 0, result.output
    builds = [line for line in result.stdout.splitlines() if line.startswith("  build ")]
    assert len(builds) == 2
    for line in builds:
        assert "cython engine instead of standalone, because" in line and "trace_bin_ms" in line
        assert "compiles its code cache once per machine" in line


@pytest.mark.parametrize(("tables", "named"), [
    ("size = 40\ncoding_level = 0.1\n", ("assemblies.size", "assemblies.coding_level")),
    ("size = 40\n[network]\nw_e_to_e = 0.2\n[plasticity.triplet]\nw_max = 0.5\n",  # 0.2 x prewire_gain 5 > 0.5
     ("network.w_e_to_e", "assemblies.prewire_gain", "plasticity.triplet.w_max")),
])
def test_check_refuses_keys_that_contradict_each_other(tmp_path: Path, tables: str, named: tuple[str, ...]) -> None:
    """size beside coding_level (the level silently won) and a w_max below the initial weights were accepted."""
    result = invoke("check", str(write(tmp_path, SWEEP.replace("size = 40\n", tables))))
    assert result.exit_code != 0
    lines = result.stderr.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("capsweep: error:") and "Traceback" not in result.output
    assert all(key in lines[0] for key in named), lines[0]


def test_help_shows_brackets_as_written_and_no_type_placeholders() -> None:
    """`query --help` printed headed 'name ': the formatter ate '[unit]'; flags showed '<bool>'."""
    for command in ("run", "query", "capacity", "export", "replay", "shrink-builds", "status", "check"):
        help_text = CliRunner().invoke(app, [command, "--help"], env={"COLUMNS": "200"}).stdout
        assert "<bool>" not in help_text and "\\[" not in help_text, command
    assert "'name [unit]'" in CliRunner().invoke(app, ["query", "--help"], env={"COLUMNS": "200"}).stdout


@pytest.mark.parametrize("args", [("query",), ("run", "odours.toml", "--bogus"), ("status", "a", "b")])
def test_a_command_line_that_does_not_parse_gets_one_error_line(args: tuple[str, ...]) -> None:
    """Usage errors came in the framework's box, other errors as one line: now both are one line."""
    proc = subprocess.run([sys.executable, "-m", "capsweep.sweeps.cli", *args], capture_output=True, text=True,
                          timeout=120)
    assert proc.returncode == 2
    lines = proc.stderr.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("capsweep: error: ") and f"capsweep {args[0]} --help" in lines[0]
