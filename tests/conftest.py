"""Shared fixtures: scikit-learn's bundled handwritten digits as continual-learning tasks.

The digits are the UCI optical recognition of handwritten digits data that ships inside
scikit-learn (``sklearn.datasets.load_digits``), so no download is needed.
"""

from __future__ import annotations

import os
import shutil
import subprocess
from pathlib import Path

import numpy as np
import pytest
import torch

torch.set_num_threads(1)  # a shared 2-core machine; one thread also fixes the kernels used

# Knobs of the test suite itself, kept from the caller's environment.
SUITE_KNOBS = {"COLONNADE_FULL_BATTERY"}
# What a launcher of torch.distributed sets for its workers (torchrun): in the caller's
# environment they would make a test's colonnade think it is one rank of a launch.
LAUNCHER_VARIABLES = ("TORCHELASTIC_RUN_ID", "RANK", "LOCAL_RANK", "GROUP_RANK", "WORLD_SIZE",
                      "LOCAL_WORLD_SIZE", "MASTER_ADDR", "MASTER_PORT")


def _clear_callers_settings() -> list[str]:
    """Remove colonnade's own settings (COLONNADE_WAIT, COLONNADE_SIGN_KEY, ...) and a
    launcher's variables from this process's environment, before any test runs.

    A user's shell may export them; every test and every command it starts in a child
    process would then sign with the user's key, wait another time for a lock, and so on.
    Tests that want one set it themselves (monkeypatch.setenv). Returns the names removed.
    """
    names = [name for name in os.environ
             if (name.startswith("COLONNADE_") and name not in SUITE_KNOBS)
             or name in LAUNCHER_VARIABLES]
    for name in names:
        del os.environ[name]
    return names


_clear_callers_settings()

SRC = Path(__file__).resolve().parent.parent / "src"


def child_env(**extra: str) -> dict[str, str]:
    """The environment for a colonnade child process: this checkout's ``src`` first on
    PYTHONPATH (so the child runs the code under test, not an installed copy), the
    caller's settings already cleared above, plus ``extra``."""
    path = f"{SRC}{os.pathsep}{os.environ.get('PYTHONPATH', '')}"
    return {**os.environ, "PYTHONPATH": path, **extra}


def strace_path() -> str | None:
    """strace's path when it can trace here (ptrace may be forbidden in a container)."""
    path = shutil.which("strace")
    if path is None:
        return None
    probe = subprocess.run([path, "-qq", "-o", os.devnull, "true"], capture_output=True)
    return path if probe.returncode == 0 else None

DIGITS_SPEC = {
    "name": "digits-mlp",
    "input": [64],
    "column": [
        {"dense": 100},
        {"norm": "batch"},
        {"act": "relu"},
        {"dropout": 0.1},
        {"dense": 100},
        {"act": "relu"},
    ],
    "lateral": {"kind": "linear"},
    "train": {"optimizer": "adamw", "lr": 0.002, "weight_decay": 0.01, "epochs": 25,
              "batch_size": 64, "patience": 5, "seed": 0},
}


def _digits() -> tuple[np.ndarray, np.ndarray]:
    from sklearn.datasets import load_digits

    d = load_digits()
    return (d.data / 16.0).astype(np.float32), d.target.astype(np.int64)


def permuted_digit_tasks(n_tasks: int, seed: int = 0):
    """Permuted-pixel tasks: task 0 is the plain digits, task t a fixed random permutation.

    Returns a list of dicts with train and test arrays (a stratified 75/25 split).
    """
    from sklearn.model_selection import train_test_split

    x, y = _digits()
    xtr, xte, ytr, yte = train_test_split(x, y, test_size=0.25, random_state=seed, stratify=y)
    rng = np.random.default_rng(seed)
    tasks = []
    for t in range(n_tasks):
        perm = np.arange(64) if t == 0 else rng.permutation(64)
        tasks.append({"name": f"perm{t}", "x": xtr[:, perm], "y": ytr,
                      "x_test": xte[:, perm], "y_test": yte})
    return tasks


def split_digit_tasks(seed: int = 0):
    """Split digits: {0,1}, {2,3}, {4,5}, {6,7}, {8,9}, each relabelled 0/1."""
    from sklearn.model_selection import train_test_split

    x, y = _digits()
    xtr, xte, ytr, yte = train_test_split(x, y, test_size=0.25, random_state=seed, stratify=y)
    tasks = []
    for a in range(0, 10, 2):
        tr, te = np.isin(ytr, [a, a + 1]), np.isin(yte, [a, a + 1])
        tasks.append({"name": f"split{a}{a + 1}", "x": xtr[tr], "y": (ytr[tr] - a),
                      "x_test": xte[te], "y_test": (yte[te] - a)})
    return tasks


def task_data(task: dict, val_fraction: float = 0.2, seed: int = 0):
    """A colonnade TaskData from a task dict, with a stratified validation split."""
    from colonnade.training.data import TaskData, stratified_split

    tr, va = stratified_split(task["y"], val_fraction, seed)
    return TaskData(torch.from_numpy(task["x"][tr]), torch.from_numpy(task["y"][tr]),
                    torch.from_numpy(task["x"][va]), torch.from_numpy(task["y"][va]),
                    int(task["y"].max()) + 1, task["name"])


def flop_macs(fn, *args) -> int:
    """MACs as PyTorch itself counts them: FlopCounterMode's FLOPs / 2.

    Source: torch.utils.flop_counter, which counts 2 FLOPs per multiply-accumulate of
    matrix products and convolutions.
    """
    from torch.utils.flop_counter import FlopCounterMode

    with FlopCounterMode(display=False) as counter:
        fn(*args)
    flops = counter.get_total_flops()
    assert flops % 2 == 0
    return flops // 2


def write_npz(path, task: dict) -> str:
    np.savez(path, x=task["x"], y=task["y"])
    return str(path)


@pytest.fixture
def digits_spec() -> dict:
    import copy

    return copy.deepcopy(DIGITS_SPEC)


def snapshot(folder) -> dict[str, bytes]:
    """Every file of a folder with its bytes, to prove that nothing was written."""
    from pathlib import Path

    return {str(p.relative_to(folder)): p.read_bytes()
            for p in sorted(Path(folder).rglob("*")) if p.is_file()}


def called_modules(net: torch.nn.Module, run) -> set[str]:
    """Names of the modules torch calls while ``run()`` runs, found by forward hooks.

    Source: torch's own forward hooks on the modules actually called, not the network's
    bookkeeping.
    """
    called: set[str] = set()
    handles = [m.register_forward_hook(lambda mod, i, o, name=name: called.add(name))
               for name, m in net.named_modules() if name]
    try:
        with torch.no_grad():
            run()
    finally:
        for h in handles:
            h.remove()
    return called


def called_tensors(net: torch.nn.Module, run) -> set[str]:
    """State keys of every module torch calls while ``run()`` runs (forward hooks).

    A parameter or buffer counts when its module or a module above it (below the network
    itself) was called; adapters run their inner maps through ``.forward``.
    """
    called = called_modules(net, run)
    keys = set()
    for key in net.state_dict():
        parts = key.split(".")[:-1]
        if any(".".join(parts[:i]) in called for i in range(1, len(parts) + 1)):
            keys.add(key)
    return keys


def called_params(net: torch.nn.Module, run) -> int:
    """``numel()`` of the parameters of the modules torch calls while ``run()`` runs."""
    params = dict(net.named_parameters())
    return sum(params[k].numel() for k in called_tensors(net, run) if k in params)
