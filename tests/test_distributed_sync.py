"""Data-parallel training's three promises, each with a test that fails fast when broken:
the batch is divided among the ranks, norm statistics are synchronised, and gradients
are averaged.

Two CPU ranks over loopback (gloo). The process group gets a shorter timeout, so a lost
collective (one rank waiting for a sync the other never joins) fails within minutes
with a message instead of hanging for gloo's default 30 minutes.

Outside references: the gradient each rank computes on its own rows without DDP
(plain autograd), averaged by hand; and torch.distributed's own ``all_gather`` to put
the ranks' tensors side by side.
"""

from __future__ import annotations

import copy
import datetime
import os

import pytest
import torch
import torch.distributed as dist
import torch.multiprocessing as mp

from colonnade.model.network import ProgressiveNet
from colonnade.model.spec import parse_spec
from colonnade.training.data import TaskData
from colonnade.training.distributed import DistributedHooks
from colonnade.training.fit import fit_task

WORLD = 2
# Only a lost sync is detected with it, so it is generous: a loaded 2-core machine must
# never read as one (torch's import alone took 9.4 s here with two busy loops running);
# a lost sync still fails in minutes, not after gloo's default 30.
TIMEOUT = datetime.timedelta(seconds=180)
# float32 sums in another order (DDP's all-reduce against a hand average): a few units of
# binary32 roundoff (2**-24) on gradients of order 1; our bound.
ATOL = 1e-6

SPEC = {"input": [5], "column": [{"dense": 6}, {"norm": "batch"}, {"act": "relu"},
                                 {"dense": 4}],
        "lateral": {"kind": "linear"},
        "train": {"epochs": 2, "batch_size": 8, "patience": 0, "cache": False}}


def _net() -> ProgressiveNet:
    torch.manual_seed(0)
    net = ProgressiveNet(parse_spec(SPEC))
    net.add_column("a", 3, seed=0)
    net.freeze()
    net.add_column("b", 3, seed=1)  # the trainable parts: column 1, its adapters, head b
    return net


def _rows(rank: int, n: int = 24):
    g = torch.Generator().manual_seed(100 + rank)  # every rank its own rows
    return torch.randn(n, 5, generator=g) * (1 + rank), torch.randint(0, 3, (n,), generator=g)


def _gather(t: torch.Tensor) -> list[torch.Tensor]:
    out = [torch.empty_like(t) for _ in range(WORLD)]
    dist.all_gather(out, t.contiguous())
    return out


def _worker(rank: int, folder: str) -> None:
    torch.set_num_threads(1)
    # The ranks meet through a file (torch.distributed's file:// rendezvous), not a port:
    # a port found free and then bound seconds later by rank 0 can be taken meanwhile.
    dist.init_process_group("gloo", init_method=f"file://{folder}/rendezvous", rank=rank,
                            world_size=WORLD, timeout=TIMEOUT)
    try:
        hooks = DistributedHooks(rank, WORLD, torch.device("cpu"))
        results: dict[str, object] = {}

        # Gradient averaging: DDP's gradient against the mean of each rank's own.
        net = _net()
        x, y = _rows(rank)
        alone = copy.deepcopy(net)
        alone.train()
        torch.nn.functional.cross_entropy(alone(x, task="b"), y).backward()
        own = {n: p.grad.detach().clone() for n, p in alone.named_parameters()
               if p.grad is not None}
        model = hooks.wrap(net, "b")
        net.train()
        torch.nn.functional.cross_entropy(model(x), y).backward()
        results["grad_names"] = sorted(own)
        results["grad_error"] = max(
            float((dict(net.named_parameters())[n].grad - sum(_gather(g)) / WORLD).abs().max())
            for n, g in own.items())

        # Batch division and buffer sync, through a real training run.
        net = _net()
        seen: list[int] = []
        handle = net.heads["b"].register_forward_hook(
            lambda m, i, o: seen.append(i[0].shape[0]) if m.training else None)
        xv, yv = _rows(WORLD, 6)  # one validation set for all ranks, as run_rank has
        fit_task(net, "b", TaskData(x, y, xv, yv, 3, "memory"), net.spec.train,
                 progress=False, ddp=hooks)
        handle.remove()
        results["batches"] = seen
        stats = net.columns[1].blocks[0].post[0].running_mean
        results["stats_spread"] = float(torch.stack(_gather(stats)).std(0).max())
        weights = net.columns[1].blocks[1].weighted.weight.detach()
        results["weights_spread"] = float(torch.stack(_gather(weights)).std(0).max())
        torch.save(results, os.path.join(folder, f"rank{rank}.pt"))
    finally:
        dist.destroy_process_group()


@pytest.fixture(scope="module")
def ranks(tmp_path_factory):
    folder = tmp_path_factory.mktemp("ddp")
    mp.start_processes(_worker, args=(str(folder),), nprocs=WORLD, join=True,
                       start_method="spawn")
    return [torch.load(folder / f"rank{r}.pt", weights_only=False) for r in range(WORLD)]


def test_gradients_are_averaged_over_ranks(ranks):
    for r in ranks:
        assert r["grad_names"]  # the trainable parts did get gradients
        assert r["grad_error"] <= ATOL


def test_batch_is_divided_among_ranks(ranks):
    # The spec's batch of 8 over 2 ranks: 4 rows per rank and step (12 rows per shard).
    for r in ranks:
        assert r["batches"] and set(r["batches"]) == {SPEC["train"]["batch_size"] // WORLD}


def test_norm_statistics_and_weights_agree_across_ranks(ranks):
    for r in ranks:
        assert r["stats_spread"] == 0.0  # broadcast from rank 0: identical bits
        assert r["weights_spread"] <= ATOL
