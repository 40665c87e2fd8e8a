"""The layer contracts (pyproject.toml, ``[tool.importlinter]``) hold, and they catch a wrong import.

The checker is import-linter (a general-purpose library that builds the import graph of a package with
grimp and tests contracts on it), run in a child process the way CI's ``lint-imports`` runs it, with the
package root first on ``sys.path`` so that it analyses this tree and not an installed copy.
"""

import os
import shutil
import subprocess
import sys
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parent.parent

_RUN = "import sys; from importlinter.cli import lint_imports; sys.exit(lint_imports(no_cache=True, no_logo=True))"


def lint(root):
    """Run the contracts of ``root/pyproject.toml`` on ``root/rtstage``; returns (exit status, report text)."""
    env = dict(os.environ, PYTHONPATH=str(root))
    result = subprocess.run([sys.executable, "-c", _RUN], cwd=root, env=env, capture_output=True, text=True,
                            timeout=300)
    return result.returncode, result.stdout + result.stderr


def test_the_tree_keeps_every_layer_contract():
    status, report = lint(ROOT)
    assert status == 0, "an import crosses the layers the wrong way:\n" + report
    # Both contracts ran (and none was skipped for a typo in its id).
    assert "2 kept, 0 broken" in report, report


def copy_tree(tmp_path):
    """A copy of the package and its contracts, to break on purpose."""
    shutil.copytree(ROOT / "rtstage", tmp_path / "rtstage", ignore=shutil.ignore_patterns("__pycache__"))
    shutil.copy(ROOT / "pyproject.toml", tmp_path / "pyproject.toml")
    return tmp_path


@pytest.mark.parametrize("module, wrong_import, expected", [
    ("kernel.py", "from .cli import main", "rtstage.kernel -> rtstage.cli"),  # the bottom importing the top
    ("render.py", "from .control import automation", "rtstage.render -> rtstage.control"),  # a driver importing control
])
def test_an_upward_import_breaks_the_layers_contract(tmp_path, module, wrong_import, expected):
    root = copy_tree(tmp_path)
    path = root / "rtstage" / module
    # A function-level import counts as much as a module-level one (grimp reads every import statement).
    path.write_text(path.read_text() + f"\n\ndef _wrong():\n    {wrong_import}\n")
    status, report = lint(root)
    assert status != 0
    assert "BROKEN" in report and expected in report, report


def test_a_module_outside_every_layer_breaks_the_contract(tmp_path):
    # exhaustive = true: a new top-level module must be given a layer before it can land.
    root = copy_tree(tmp_path)
    (root / "rtstage" / "stray.py").write_text('"""Nobody placed me."""\n')
    status, report = lint(root)
    assert status != 0
    assert "stray" in report, report
