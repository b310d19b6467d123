"""The shape of the code: the import layers hold, quick commands stay light, files and
functions stay short.

The layer rules are import-linter contracts in pyproject.toml ([tool.importlinter]); the
tests run the linter on this tree, and once on a copy with a forbidden import added, to show
that the contracts can fail.
"""

from __future__ import annotations

import ast
import json
import os
import shutil
import subprocess
import sys
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]
PACKAGE = ROOT / "fleetsim"

HEAVY = ("matplotlib", "scipy", "pandas", "pyarrow", "dask", "statsmodels")
MAX_FILE_LINES = 400
MAX_FUNCTION_LINES = 80
LONG_REASON = "long because"  # a longer function's docstring says why, in these words

_LINT = "import sys; from importlinter.cli import lint_imports_command; sys.exit(lint_imports_command())"


def _lint(cwd: Path, pythonpath: Path) -> subprocess.CompletedProcess[str]:
    """Run lint-imports with the contracts of ``cwd``/pyproject.toml on the fleetsim found first
    on ``pythonpath``."""
    env = {**os.environ, "PYTHONPATH": str(pythonpath)}
    return subprocess.run([sys.executable, "-c", _LINT, "--no-cache"], cwd=cwd, env=env, capture_output=True,
                          text=True, timeout=120)


def _imported_by(*args: str, preload: str = "") -> list[str]:
    """The heavy libraries loaded by a fresh process running ``fleetsim ARGS`` (it must succeed),
    after importing the module ``preload`` first, if given."""
    probe = (
        f"import sys{', ' + preload if preload else ''}; sys.argv = ['fleetsim', *sys.argv[1:]]\n"
        "from fleetsim.cli import main\n"
        "try:\n    main()\nexcept SystemExit as exc:\n    assert not exc.code, exc.code\n"
        f"print(sorted({{n.split('.')[0] for n in sys.modules}} & set({HEAVY!r})), file=sys.stderr)\n"
    )
    done = subprocess.run([sys.executable, "-c", probe, *args], capture_output=True, text=True, cwd=ROOT,
                          timeout=60)
    assert done.returncode == 0, done.stderr
    return json.loads(done.stderr.strip().splitlines()[-1].replace("'", '"'))


@pytest.mark.parametrize("args", [["check", str(PACKAGE / "data" / "inkwren.yaml")], ["schema"], ["--help"]])
def test_quick_commands_load_no_plotting_statistics_or_table_library(args):
    assert _imported_by(*args) == []


def test_the_probe_sees_a_heavy_library_when_one_is_loaded():
    # The check above must be able to fail: the same probe, with pandas imported on purpose.
    assert "pandas" in _imported_by("schema", preload="pandas")


def test_import_contracts_hold():
    done = _lint(ROOT, ROOT)
    assert done.returncode == 0, done.stdout + done.stderr


def test_a_forbidden_import_breaks_the_contracts(tmp_path):
    # A copy of the package whose event log imports the command line: the core must not.
    shutil.copytree(PACKAGE, tmp_path / "fleetsim", ignore=shutil.ignore_patterns("__pycache__"))
    shutil.copy(ROOT / "pyproject.toml", tmp_path / "pyproject.toml")
    events = tmp_path / "fleetsim" / "events.py"
    events.write_text(events.read_text(encoding="utf-8") + "\nimport fleetsim.cli  # noqa: E402,F401\n",
                      encoding="utf-8")
    done = _lint(tmp_path, tmp_path)
    assert done.returncode != 0
    assert "the core knows nothing of files, reports, studies or the command line BROKEN" in done.stdout
    assert "layers BROKEN" in done.stdout
    assert "fleetsim.events -> fleetsim.cli" in done.stdout


def _sources() -> list[Path]:
    return sorted(PACKAGE.rglob("*.py"))


# Modules allowed over the limit: none; nothing may join.
OVER_LIMIT: set[str] = set()


def test_no_module_is_longer_than_400_lines():
    long = {str(p.relative_to(ROOT)): n for p in _sources()
            if (n := len(p.read_text(encoding="utf-8").splitlines())) > MAX_FILE_LINES
            and str(p.relative_to(ROOT)) not in OVER_LIMIT}
    assert long == {}, f"modules over {MAX_FILE_LINES} lines: {long}"


def _long_functions(source: str) -> list[tuple[str, int]]:
    """(name, lines) of each function over the limit whose docstring does not say why."""
    found = []
    for node in ast.walk(ast.parse(source)):
        if isinstance(node, (ast.FunctionDef, ast.AsyncFunctionDef)):
            lines = node.end_lineno - node.lineno + 1 if node.end_lineno else 0
            doc = ast.get_docstring(node) or ""
            if lines > MAX_FUNCTION_LINES and LONG_REASON not in doc.lower():
                found.append((node.name, lines))
    return found


def test_the_function_length_check_finds_a_long_function():
    body = "\n".join(f"    x{i} = {i}" for i in range(MAX_FUNCTION_LINES))
    assert _long_functions(f"def f():\n{body}\n") == [("f", MAX_FUNCTION_LINES + 1)]
    reason = '    """Long because it lists every case."""\n'
    assert _long_functions(f"def f():\n{reason}{body}\n") == []


def test_no_function_is_longer_than_80_lines_unless_it_says_why():
    long = {f"{p.relative_to(ROOT)}:{name}": n for p in _sources()
            for name, n in _long_functions(p.read_text(encoding="utf-8"))}
    assert long == {}, f"functions over {MAX_FUNCTION_LINES} lines without a reason: {long}"
