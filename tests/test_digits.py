"""Progressive growth on scikit-learn's bundled digits (permuted-pixel tasks).

Outside references: the UCI handwritten digits shipped in scikit-learn; the bar of 90 %
test accuracy per task (a 64-100-100-10 MLP reaches about 96.5 % on the unpermuted
digits, measured on this project's machine); and plain fine-tuning of one network as the
forgetting baseline that colonnade must be told apart from.
"""

from __future__ import annotations

import pytest
import torch
import torch.nn as nn
import torch.nn.functional as F
from conftest import permuted_digit_tasks, task_data

import colonnade
from colonnade.model.spec import parse_spec
from colonnade.training.fit import evaluate, make_optimizer, task_logits

N_TASKS = 5


def _run_sequence(spec_raw, tmp_path):
    spec = parse_spec(spec_raw)
    tasks = permuted_digit_tasks(N_TASKS)
    net = colonnade.ProgressiveNet(spec)
    reference = {}
    accuracy = {}
    for t in tasks:
        colonnade.grow(net, t["name"], task_data(t), progress=False)
        x_test = torch.from_numpy(t["x_test"])
        reference[t["name"]] = task_logits(net, t["name"], x_test)
        accuracy[t["name"]], _ = evaluate(net, t["name"], x_test, torch.from_numpy(t["y_test"]))
        for earlier in tasks:  # every earlier task, after every growth step
            if earlier["name"] in reference:
                now = task_logits(net, earlier["name"], torch.from_numpy(earlier["x_test"]))
                assert torch.equal(now, reference[earlier["name"]]), earlier["name"]
    ws = tmp_path / "ws"
    ws.mkdir()
    colonnade.save(net, ws)
    back = colonnade.load(ws)
    for t in tasks:
        assert torch.equal(task_logits(back, t["name"], torch.from_numpy(t["x_test"])),
                           reference[t["name"]])
    return accuracy


@pytest.mark.parametrize("optimizer", ["adamw", "sgd"])
def test_five_permuted_tasks_learn_and_never_move(digits_spec, tmp_path, optimizer):
    if optimizer == "sgd":
        digits_spec["train"] = {"optimizer": "sgd", "lr": 0.05, "momentum": 0.9,
                                "weight_decay": 0.0005, "epochs": 25, "batch_size": 64,
                                "patience": 5, "seed": 0}
    accuracy = _run_sequence(digits_spec, tmp_path)
    assert len(accuracy) == N_TASKS
    for name, acc in accuracy.items():
        # 0.90: the module docstring's bar, below the ~96.5 % measured here for one MLP.
        assert acc >= 0.90, (name, acc)


def test_nonlinear_adapters_also_learn_and_never_move(digits_spec, tmp_path):
    digits_spec["lateral"] = {"kind": "nonlinear", "reduce": 0.5}
    digits_spec["train"]["epochs"] = 15
    accuracy = _run_sequence(digits_spec, tmp_path)
    assert min(accuracy.values()) >= 0.90, accuracy  # the same bar (measured here, above)


def test_plain_fine_tuning_forgets(digits_spec):
    # The baseline: one network fine-tuned on each task in turn (same template, AdamW).
    tasks = permuted_digit_tasks(3)
    spec = parse_spec(digits_spec)
    torch.manual_seed(0)
    model = nn.Sequential(nn.Linear(64, 100), nn.BatchNorm1d(100), nn.ReLU(), nn.Dropout(0.1),
                          nn.Linear(100, 100), nn.ReLU(), nn.Linear(100, 10))
    opt = make_optimizer(list(model.parameters()), spec.train)
    gen = torch.Generator().manual_seed(0)

    def acc_on(t):
        model.eval()
        with torch.no_grad():
            pred = model(torch.from_numpy(t["x_test"])).argmax(1)
        return (pred == torch.from_numpy(t["y_test"])).double().mean().item()

    first = None
    for t in tasks:
        x, y = torch.from_numpy(t["x"]), torch.from_numpy(t["y"])
        for _ in range(25):
            model.train()
            for idx in torch.randperm(len(y), generator=gen).split(64):
                if len(idx) < 2:
                    continue
                loss = F.cross_entropy(model(x[idx]), y[idx])
                opt.zero_grad()
                loss.backward()
                opt.step()
        if first is None:
            first = acc_on(tasks[0])
    last = acc_on(tasks[0])
    assert first >= 0.90  # the same bar: the baseline learnt task 0 before forgetting it
    # Forgetting, which colonnade never shows: plain fine-tuning lost well over 0.2 here
    # (measured here); catastrophic forgetting of permuted tasks is the effect Rusu et al.
    # 2016 and Lopez-Paz & Ranzato 2017 report for a single network trained in sequence.
    assert first - last >= 0.20, (first, last)
