"""Latency measurement: a stated thread count, interleaved tasks, and figures too spread
out to trust marked as such. Nothing here asserts a time.

Outside references: ``numpy.percentile`` (its default linear interpolation) for the
quartiles, ``torch.get_num_threads`` read inside the timed calls, and forward hooks for
the order in which the tasks really ran.
"""

from __future__ import annotations

import json

import numpy as np
import pytest
import torch

from colonnade.cli import main
from colonnade.costing import latency
from colonnade.files.store import create, save
from colonnade.model.network import ProgressiveNet
from colonnade.model.spec import parse_spec

SPEC = {"name": "lat", "input": [5], "column": [{"dense": 6}, {"act": "relu"}],
        "lateral": {"kind": "linear"}}


def _net() -> ProgressiveNet:
    torch.manual_seed(0)
    net = ProgressiveNet(parse_spec(SPEC))
    for name in ("a", "b", "c"):
        net.add_column(name, 3, seed=0)
        net.freeze()
    return net.eval()


def test_tasks_are_timed_in_turn_with_the_stated_threads():
    net = _net()
    order: list[tuple[str, int]] = []
    for name in net.tasks:
        net.heads[name].register_forward_hook(
            lambda m, i, o, name=name: order.append((name, torch.get_num_threads())))
    before = torch.get_num_threads()
    out = latency.measure_latencies(net, ["a", "b"], repeats=4, batches=(1,), threads=2,
                                    warmup=1)
    assert torch.get_num_threads() == before  # restored
    # Source: torch.get_num_threads() inside every call.
    assert {t for _, t in order} == {2}
    assert out["a"][1].threads == 2 and out[latency.ALL_TASKS][1].threads == 2
    # After one warm-up call of each (a, b, one pass over a, b and c), each repeat runs
    # a, b and the one pass in turn: never the same task twice in a row.
    timed = [name for name, _ in order][5:]
    assert timed == ["a", "b", "a", "b", "c"] * 4


def test_quartiles_and_the_spread_flag():
    ms = [1.0, 1.1, 0.9, 1.05, 9.0, 1.0, 12.0, 1.2]
    lat = latency.summarise(ms, batch=1, threads=1, device="cpu")
    # Source: numpy.percentile, linear interpolation (its default).
    assert lat.q1 == pytest.approx(np.percentile(ms, 25), abs=1e-12)
    assert lat.q3 == pytest.approx(np.percentile(ms, 75), abs=1e-12)
    assert lat.median == pytest.approx(np.median(ms), abs=1e-12)
    assert lat.spread == pytest.approx((lat.q3 - lat.q1) / lat.median, abs=1e-12)
    assert lat.trusted == (lat.spread <= latency.SPREAD_LIMIT)
    steady = latency.summarise([1.0, 1.01, 0.99, 1.0], 1, 1, "cpu")
    assert steady.trusted and steady.to_dict()["trusted"] is True


def test_cost_marks_untrustworthy_figures(tmp_path, capsys, monkeypatch):
    ws = tmp_path / "ws"
    create(parse_spec(SPEC), ws)
    save(_net(), ws)
    capsys.readouterr()
    assert main(["cost", str(ws), "--repeats", "3", "--threads", "1"]) == 0
    out = capsys.readouterr().out
    assert "latency b1 ms (IQR), 1 thread" in out
    monkeypatch.setattr(latency, "SPREAD_LIMIT", -1.0)  # no figure can be trusted now
    assert main(["cost", str(ws), "--repeats", "3"]) == 0
    out = capsys.readouterr().out
    assert "noisy (" in out and "measure again on a quiet machine" in out
    assert main(["cost", str(ws), "--repeats", "3", "--json"]) == 0
    led = json.loads(capsys.readouterr().out)
    assert led["latency_threads"] == 1
    assert led["tasks"][0]["latency_ms"]["batch_1"]["trusted"] is False
    assert main(["report", str(ws), "-o", str(tmp_path / "r"), "--repeats", "3",
                 "--project", "1"]) == 0
    text = (tmp_path / "r" / "report.md").read_text()
    assert "untrustworthy" in text and "with 1 thread" in text
