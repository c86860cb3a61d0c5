"""The continual-learning record against its published definitions and a forgetting baseline.

Outside references: ACC, BWT and FWT as defined by Lopez-Paz & Ranzato 2017 (Gradient
Episodic Memory, arXiv:1706.08840, Sec. 2; the formulas are recalled from the paper and
restated in transfer.py); scikit-learn's ``accuracy_score``; the UCI digits bundled in
scikit-learn; and plain fine-tuning of one network as the baseline that forgets.
"""

from __future__ import annotations

import json

import pytest
import torch
import torch.nn as nn
import torch.nn.functional as F
from conftest import permuted_digit_tasks, task_data
from test_seal import digits_spec, grow_and_seal, write_probe

import colonnade
from colonnade.cli import main
from colonnade.evidence import transfer
from colonnade.files import store
from colonnade.model import guard
from colonnade.model.digest import raw_bytes
from colonnade.training import validation
from colonnade.training.fit import make_optimizer, task_logits

N_TASKS = 5
EPOCHS = 4


def test_metrics_on_a_hand_made_matrix():
    # R[i][j]: accuracy on task j after learning task i; b: a random network's accuracy.
    R = [[0.90, 0.30, None],
         [0.80, 0.85, 0.40],
         [0.70, 0.80, 0.95]]
    b = [0.10, 0.20, 0.30]
    # By hand from the paper's formulas:
    # ACC = (0.70 + 0.80 + 0.95) / 3
    # BWT = ((0.70 - 0.90) + (0.80 - 0.85)) / 2 = -0.125
    # FWT = ((0.30 - 0.20) + (0.40 - 0.30)) / 2 = 0.10
    assert transfer.average_accuracy(R) == pytest.approx(2.45 / 3)
    assert transfer.backward_transfer(R) == pytest.approx(-0.125)
    assert transfer.forward_transfer(R, b) == pytest.approx(0.10)
    assert transfer.backward_transfer(R, [1]) == pytest.approx(-0.05)  # task 2 only
    assert transfer.backward_transfer(R, [2]) is None  # the last task has no BWT term
    R[1][2] = None
    assert transfer.forward_transfer(R, b) is None  # undefined, not guessed


@pytest.fixture(scope="module")
def grown(tmp_path_factory):
    """Five permuted-digit tasks grown with nonlinear laterals, each sealed right after."""
    root = tmp_path_factory.mktemp("transfer")
    tasks = permuted_digit_tasks(N_TASKS)
    ws = root / "ws"
    net = store.create(digits_spec("adamw", "nonlinear"), ws)
    for t in tasks:
        grow_and_seal(net, t, write_probe(root, t), workspace=ws)
    store.save(net, ws)
    return ws, tasks


def test_plain_fine_tuning_forgets_and_colonnade_does_not(grown):
    ws, tasks = grown
    spec = colonnade.parse_spec(digits_spec("adamw"))
    torch.manual_seed(0)
    # The same template as one network with one head, fine-tuned on each task in turn.
    model = nn.Sequential(nn.Linear(64, 100), nn.BatchNorm1d(100), nn.ReLU(), nn.Dropout(0.1),
                          nn.Linear(100, 100), nn.ReLU(), nn.Linear(100, 10))
    opt = make_optimizer(list(model.parameters()), spec.train)
    gen = torch.Generator().manual_seed(0)
    data = [task_data(t) for t in tasks]

    def accuracy(d) -> float:
        model.eval()
        with torch.no_grad():
            return (model(d.x_val).argmax(1) == d.y_val).double().mean().item()

    R = []
    for d in data:
        for _ in range(EPOCHS * 2):
            model.train()
            for idx in torch.randperm(d.n_train, generator=gen).split(64):
                if len(idx) > 1:
                    loss = F.cross_entropy(model(d.x[idx]), d.y[idx])
                    opt.zero_grad()
                    loss.backward()
                    opt.step()
        R.append([accuracy(e) for e in data])
    fine_tuning = transfer.backward_transfer(R)
    assert fine_tuning <= -0.2, R

    rec = transfer.record(store.load(ws), guard.sealed_tasks(store.load(ws)))
    assert rec["tasks"] == [t["name"] for t in tasks]
    assert rec["BWT"] == 0.0 and rec["BWT_sealed"] == 0.0  # exactly, not approximately
    assert rec["ACC"] > 0.8


def test_the_matrix_is_what_it_says(grown):
    from sklearn.metrics import accuracy_score

    ws, tasks = grown
    net = store.load(ws)
    _, R, b = transfer.accuracy_matrix(net)
    T = len(tasks)
    for i, t in enumerate(tasks):
        d = task_data(t)  # the same split colonnade stored with the task
        x, y = validation.validation(net, t["name"])
        assert raw_bytes(x) == raw_bytes(d.x_val) and torch.equal(y, d.y_val)
        pred = task_logits(net, t["name"], d.x_val).argmax(1).numpy()
        assert R[T - 1][i] == pytest.approx(accuracy_score(d.y_val.numpy(), pred))
        assert R[i][i] == net.meta["records"][t["name"]]["val_accuracy"]
        for row in range(i, T):  # a frozen task's accuracy is the same after every step
            assert R[row][i] == R[i][i]
        for j in range(i + 2, T):  # tasks not grown yet have no entry
            assert R[i][j] is None
        assert 0.0 <= b[i] <= 1.0
        if i:
            assert R[i - 1][i] is not None


def test_without_laterals_forward_transfer_is_exactly_zero(tmp_path):
    # Independent columns: earlier training cannot reach a new task, so R[i-1][i] = b[i].
    net = colonnade.ProgressiveNet(colonnade.parse_spec(digits_spec("sgd", "none")))
    for t in permuted_digit_tasks(3):
        colonnade.grow(net, t["name"], task_data(t), epochs=1, progress=False)
    rec = transfer.record(net)
    steps = [e for e in net.meta["history"] if e["step"] == "column_added"]
    assert all(e["before_training"] == e["random_init"] for e in steps)
    assert rec["FWT"] == 0.0


def test_with_laterals_the_random_network_differs_only_in_earlier_parts(grown):
    ws, tasks = grown
    net = store.load(ws)
    before = {k: raw_bytes(v) for k, v in net.state_dict().items()}
    rng = torch.get_rng_state()
    keep = ["column:2", "head:perm2"]
    clone = validation.random_init_copy(net, keep, seed=7)
    assert torch.equal(torch.get_rng_state(), rng)  # no side effect on the global RNG
    assert {k: raw_bytes(v) for k, v in net.state_dict().items()} == before
    after = clone.state_dict()
    for key, value in before.items():
        if key.startswith(("columns.2.", "heads.perm2.")):
            assert raw_bytes(after[key]) == value, key  # the new task's parts: untouched
        else:  # every trained tensor (weights, norm statistics, alpha) is re-initialised
            assert raw_bytes(after[key]) != value, key


def test_show_prints_the_record(grown, capsys):
    ws, tasks = grown
    assert main(["show", str(ws), "--json"]) == 0
    info = json.loads(capsys.readouterr().out)
    rec = info["transfer"]
    assert set(rec) >= {"R", "random_init", "ACC", "BWT", "BWT_sealed", "FWT"}
    assert rec["BWT"] == 0.0 and len(rec["R"]) == N_TASKS
    assert [t["seal"] for t in info["tasks"]] == [1] * N_TASKS
    assert set(info["seals"]) == {t["name"] for t in tasks}
    assert main(["show", str(ws)]) == 0
    out = capsys.readouterr().out
    assert "ACC " in out and "BWT +0.0000 (sealed tasks +0.0000)" in out and "FWT " in out
