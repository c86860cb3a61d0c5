"""Data-parallel training of a new column with torch.distributed and DistributedDataParallel.

Every rank loads the same workspace and grows the same parts from the same seed, so all
start identical. Only the trainable parts (the new column, its adapters, its head) are
wrapped in DistributedDataParallel; frozen columns run in eval mode outside it, so no
frozen tensor is in a gradient bucket. Each rank trains on a fixed shard of the training
rows, drawn once by ``DistributedSampler`` seeded from the spec, and reshuffles within
its shard every epoch; the frozen-activation cache is then built per shard. The batch
size per rank is the spec's batch size divided by the number of ranks, and DDP averages
gradients, so one step sees about the same number of rows as single-process training.

This module holds the data-parallel mechanics only; launching ranks, loading the
workspace in each and committing rank 0's result is a workspace verb
(``colonnade.app.distributed_grow``). Only rank 0 writes.
"""

from __future__ import annotations

import os
import signal
from typing import Any

import torch
import torch.distributed as dist
import torch.nn as nn
from torch.nn.parallel import DistributedDataParallel
from torch.utils.data import DistributedSampler

from ..errors import ColonnadeError

__all__ = ["DistributedHooks", "TrainablePath", "WorkerFailed", "launched_by_torchrun",
           "torchrun_rank", "shard_rows", "fault_hook", "FAULT_ENV"]

# For tests only: "RANK:EPOCH" makes that rank kill itself (SIGKILL) as that epoch starts,
# so the failure path is exercised with a real dead process.
FAULT_ENV = "COLONNADE_FAULT_KILL"


class WorkerFailed(ColonnadeError):
    exit_code = 1


class TrainablePath(nn.Module):
    """The trainable parts of a growing task as one module, for DistributedDataParallel.

    Its submodules are the network's own new column, adapters and head (shared, not
    copied); ``forward`` runs the task through the whole network, so frozen columns run
    too, but only these parameters are registered with DDP.
    """

    def __init__(self, net: nn.Module, task: str) -> None:
        super().__init__()
        modules = dict(net.part_modules())
        self.parts = nn.ModuleDict({part.replace(":", "__").replace(".", "_"): modules[part]
                                    for part in net.trainable_parts})
        self._net = [net]  # a list, so the whole network is not registered as a submodule
        self.task = task

    def forward(self, x: torch.Tensor, given: Any = None) -> torch.Tensor:
        return self._net[0](x, task=self.task, given=given)


def launched_by_torchrun() -> bool:
    """True inside a process that torchrun (or another launcher) started as one rank."""
    return "TORCHELASTIC_RUN_ID" in os.environ and int(os.environ.get("WORLD_SIZE", "1")) > 1


def torchrun_rank() -> int:
    """This process's rank in a torchrun launch (0 outside one)."""
    return int(os.environ.get("RANK", "0"))


def shard_rows(n: int, rank: int, world: int, seed: int) -> torch.Tensor:
    """This rank's fixed shard of ``n`` training rows, by torch's DistributedSampler."""
    sampler = DistributedSampler(range(n), num_replicas=world, rank=rank, shuffle=True,
                                 seed=seed, drop_last=True)
    return torch.tensor(list(iter(sampler)), dtype=torch.int64).sort().values


def fault_hook(rank: int) -> Any:
    spec = os.environ.get(FAULT_ENV)
    if not spec:
        return None
    want_rank, _, epoch = spec.partition(":")
    if int(want_rank) != rank:
        return None

    def hook(current_epoch: int) -> None:
        if current_epoch >= int(epoch or 1):
            os.kill(os.getpid(), signal.SIGKILL)

    return hook


class DistributedHooks:
    """What fit_task needs to train data-parallel: the DDP wrapper and buffer syncing."""

    def __init__(self, rank: int, world: int, device: torch.device, fault: Any = None) -> None:
        self.rank, self.world, self.device, self.fault = rank, world, device, fault

    def batch_size(self, batch_size: int) -> int:
        return max(2, batch_size // self.world)

    def wrap(self, net: nn.Module, task: str) -> nn.Module:
        path = TrainablePath(net, task)
        ids = [self.device.index] if self.device.type == "cuda" else None
        # Buffers are identical at the start (same workspace, same seed) and are synced
        # from rank 0 before each validation (sync_buffers), not on every forward.
        return DistributedDataParallel(path, device_ids=ids, forward_sync_buffers=False)

    def before_epoch(self, epoch: int) -> None:
        if self.fault is not None:
            self.fault(epoch)

    def sync_buffers(self, net: nn.Module) -> None:
        """Rank 0's norm statistics everywhere, so every rank validates the same model."""
        for part, module in net.part_modules():
            if net.is_trainable(part):
                for b in module.buffers():
                    dist.broadcast(b, src=0)

