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


def test_an_upward_import_breaks_the_layers_contract(tmp_path):
    root = copy_tree(tmp_path)
    kernel = root / "rtstage" / "kernel.py"
    # A function-level import counts as much as a module-level one (grimp reads every import statement).
    kernel.write_text(kernel.read_text() + "\n\ndef _wrong():\n    from .cli import main\n\n    return main\n")
    status, report = lint(root)
    assert status != 0
    assert "BROKEN" in report and "rtstage.kernel -> rtstage.cli" in report, report


def test_a_driver_importing_control_breaks_the_layers_contract(tmp_path):
    root = copy_tree(tmp_path)
    render = root / "rtstage" / "render.py"
    render.write_text(render.read_text() + "\n\ndef _wrong():\n    from .control import automation\n\n    return automation\n")
    status, report = lint(root)
    assert status != 0
    assert "rtstage.render -> rtstage.control" in report, report


def test_a_module_outside_every_layer_breaks_the_contract(tmp_path):
    # exhaustive = true: a new top-level module must be given a layer before it can land.
    root = copy_tree(tmp_path)
    (root / "rtstage" / "stray.py").write_text('"""Nobody placed me."""\n')
    status, report = lint(root)
    assert status != 0
    assert "stray" in report, report
