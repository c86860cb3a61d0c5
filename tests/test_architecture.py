"""The layering, checked by import-linter (an outside tool), and torch-free start-up.

import-linter's layers contract in pyproject.toml is the reference: it must hold on the
package as it is, and it must fail, naming the import, when a lower layer imports a
higher one (shown on a copy of the package with one upward import added).
"""

from __future__ import annotations

import shutil
import subprocess
import sys
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]
LINT = Path(sys.executable).with_name("lint-imports")

pytestmark = pytest.mark.skipif(not LINT.exists(), reason="import-linter is not installed")


def _lint(src: Path) -> subprocess.CompletedProcess:
    return subprocess.run([str(LINT), "--config", str(ROOT / "pyproject.toml"), "--no-cache"],
                          cwd=src, capture_output=True, text=True, timeout=120,
                          env={"PYTHONPATH": str(src), "PATH": "/usr/bin:/bin"})


def test_the_layers_contract_holds():
    result = _lint(ROOT / "src")
    assert result.returncode == 0, result.stdout + result.stderr
    assert "0 broken" in result.stdout


def test_an_upward_import_breaks_the_contract_and_is_named(tmp_path):
    shutil.copytree(ROOT / "src" / "colonnade", tmp_path / "colonnade")
    spec = tmp_path / "colonnade" / "model" / "spec.py"
    spec.write_text(spec.read_text() + "\nfrom ..files import store  # noqa: E402,F401\n")
    result = _lint(tmp_path)
    assert result.returncode != 0
    assert "colonnade.model.spec -> colonnade.files.store" in result.stdout


def test_a_circle_inside_a_layer_breaks_the_contract(tmp_path):
    shutil.copytree(ROOT / "src" / "colonnade", tmp_path / "colonnade")
    layers = tmp_path / "colonnade" / "model" / "layers.py"
    # an import inside a function counts: spec -> layers already exists, so this closes a circle
    layers.write_text(layers.read_text()
                      + "\n\ndef _late():\n    from . import spec  # noqa: F401\n")
    result = _lint(tmp_path)
    assert result.returncode != 0
    assert "BROKEN" in result.stdout


@pytest.mark.parametrize("argv", [["--help"], ["--version"]])
def test_help_and_version_do_not_import_torch(argv):
    code = ("import sys\nfrom colonnade.cli import main\n"
            f"try:\n    main({argv!r})\nexcept SystemExit:\n    pass\n"
            "assert 'torch' not in sys.modules, 'torch was imported'\n")
    result = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                            timeout=60)
    assert result.returncode == 0, result.stderr
