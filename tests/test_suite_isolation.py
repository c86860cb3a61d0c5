"""The suite does not depend on the caller's shell: colonnade's own settings exported
there (COLONNADE_WAIT, COLONNADE_SIGN_KEY, ...) never reach a test or a command it starts.

Reference: the environment a child process started by the test receives (execve(2)),
as the child itself lists it, besides this process's ``os.environ``.
"""

from __future__ import annotations

import json
import os
import subprocess
import sys

from conftest import LAUNCHER_VARIABLES, SUITE_KNOBS


def _leftover(names) -> list[str]:
    return sorted(name for name in names
                  if (name.startswith("COLONNADE_") and name not in SUITE_KNOBS)
                  or name in LAUNCHER_VARIABLES)


def test_no_colonnade_setting_of_the_caller_reaches_the_tests():
    assert _leftover(os.environ) == []


def test_no_colonnade_setting_of_the_caller_reaches_a_child_process():
    child = subprocess.run([sys.executable, "-c", "import json, os; print(json.dumps([*os.environ]))"],
                           capture_output=True, text=True, timeout=120, check=True)
    assert _leftover(json.loads(child.stdout)) == []
