"""Data-parallel training of a new column with torch.distributed and DistributedDataParallel.

Every rank loads the same workspace and grows the same parts from the same seed, so all
start identical. Only the trainable parts (the new column, its adapters, its head) are
wrapped in DistributedDataParallel; frozen columns run in eval mode outside it, so no
frozen tensor is in a gradient bucket. Each rank trains on a fixed shard of the training
rows, drawn once by ``DistributedSampler`` seeded from the spec, and reshuffles within
its shard every epoch; the frozen-activation cache is then built per shard. The batch
size per rank is the spec's batch size divided by the number of ranks, and DDP averages
gradients, so one step sees about the same number of rows as single-process training.

Only rank 0 writes. Launched locally (``grow --nproc N``), rank 0 writes the trained
network to a staging folder and the parent process commits it to the workspace only
after every worker has exited cleanly, so a failed or killed worker leaves the
workspace exactly as before. Launched by ``torchrun`` across machines, rank 0 commits
after a final barrier.
"""

from __future__ import annotations

import logging
import os
import socket
import tempfile
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import torch
import torch.distributed as dist
import torch.nn as nn

from .errors import ColonnadeError, UsageError

__all__ = ["GrowRequest", "grow_distributed", "launched_by_torchrun", "run_rank",
           "run_torchrun_rank", "DistributedHooks",
           "TrainablePath", "WorkerFailed"]

# For tests only: "RANK:EPOCH" makes that rank kill itself (SIGKILL) as that epoch starts,
# so the failure path is exercised with a real dead process.
FAULT_ENV = "COLONNADE_FAULT_KILL"


class WorkerFailed(ColonnadeError):
    exit_code = 1


@dataclass
class GrowRequest:
    """What every rank needs to grow one task; plain data, so it pickles to spawned ranks."""

    folder: str
    task: str
    train: str
    val: str | None = None
    mode: str = "column"
    on: str | None = None
    width: float = 1.0
    classes: int | None = None
    epochs: int | None = None
    device: str | None = None
    cache: bool | None = None
    cache_mb: float | None = None
    target: float | None = None


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


def _free_port() -> int:
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def _shard_rows(n: int, rank: int, world: int, seed: int) -> torch.Tensor:
    """This rank's fixed shard of ``n`` training rows, by torch's DistributedSampler."""
    from torch.utils.data import DistributedSampler

    sampler = DistributedSampler(range(n), num_replicas=world, rank=rank, shuffle=True,
                                 seed=seed, drop_last=True)
    return torch.tensor(list(iter(sampler)), dtype=torch.int64).sort().values


def _maybe_fault(rank: int) -> Any:
    spec = os.environ.get(FAULT_ENV)
    if not spec:
        return None
    want_rank, _, epoch = spec.partition(":")
    if int(want_rank) != rank:
        return None

    def hook(current_epoch: int) -> None:
        if current_epoch >= int(epoch or 1):
            import signal

            os.kill(os.getpid(), signal.SIGKILL)

    return hook


def run_rank(rank: int, world: int, request: GrowRequest, staging: str | None,
             progress: bool = True) -> dict[str, Any] | None:
    """One rank's work: grow, train on its shard, and (rank 0) write the result."""
    from .data import TaskData, load_task_data
    from .growth import grow, resolve_device
    from .store import load, save

    device = resolve_device(request.device)
    backend = "nccl" if device.type == "cuda" else "gloo"
    if device.type == "cuda":
        device = torch.device("cuda", rank % torch.cuda.device_count())
        torch.cuda.set_device(device)
    if not dist.is_initialized():
        dist.init_process_group(backend, rank=rank, world_size=world)
    try:
        net = load(request.folder)
        data = load_task_data(request.train, net.input_shape, classes=request.classes,
                              val_path=request.val, val_fraction=net.spec.train.val_fraction,
                              seed=net.spec.train.seed)
        rows = _shard_rows(data.n_train, rank, world, net.spec.train.seed)
        shard = TaskData(data.x[rows], data.y[rows], data.x_val, data.y_val, data.classes,
                         data.source)
        ddp = DistributedHooks(rank, world, device, _maybe_fault(rank))
        entry = grow(net, request.task, shard, mode=request.mode, on=request.on,
                     width=request.width, epochs=request.epochs, device=str(device),
                     progress=progress and rank == 0, cache=request.cache,
                     cache_mb=request.cache_mb, target=request.target, ddp=ddp)
        entry["distributed"] = {"ranks": world, "backend": backend,
                                "rows_per_rank": int(rows.numel()),
                                "batch_per_rank": ddp.batch_size(net.spec.train.batch_size)}
        net.meta["records"][request.task]["data"]["n_train"] = data.n_train
        dist.barrier()
        if rank == 0:
            if staging is not None:
                Path(staging).mkdir()
                save(net, staging)
            else:
                save(net, request.folder)
        dist.barrier()
    finally:
        dist.destroy_process_group()
    return entry if rank == 0 else None


def run_torchrun_rank(request: GrowRequest, progress: bool = True) -> dict[str, Any] | None:
    """This process's rank of a torchrun launch; rank 0 commits to the workspace."""
    rank, world = int(os.environ["RANK"]), int(os.environ["WORLD_SIZE"])
    return run_rank(rank, world, request, None, progress)


class DistributedHooks:
    """What fit_task needs to train data-parallel: the DDP wrapper and buffer syncing."""

    def __init__(self, rank: int, world: int, device: torch.device, fault: Any = None) -> None:
        self.rank, self.world, self.device, self.fault = rank, world, device, fault

    def batch_size(self, batch_size: int) -> int:
        return max(2, batch_size // self.world)

    def wrap(self, net: nn.Module, task: str) -> nn.Module:
        from torch.nn.parallel import DistributedDataParallel

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


def _spawned(rank: int, world: int, port: int, request: GrowRequest, staging: str,
             progress: bool) -> None:
    os.environ.update(MASTER_ADDR="127.0.0.1", MASTER_PORT=str(port))
    torch.set_num_threads(max(1, (os.cpu_count() or 1) // world))
    run_rank(rank, world, request, staging, progress)


def grow_distributed(request: GrowRequest, nproc: int, progress: bool = True,
                     ) -> dict[str, Any]:
    """Grow one task with ``nproc`` local ranks; commit only when all of them succeeded."""
    import torch.multiprocessing as mp

    from .store import load, save

    if nproc < 2:
        raise UsageError(f"--nproc must be at least 2 for data-parallel training, got {nproc}")
    if request.device and request.device.startswith("cuda") and (
            torch.cuda.device_count() < nproc):
        raise UsageError(f"--nproc {nproc} with --device cuda needs {nproc} GPUs, this "
                         f"machine has {torch.cuda.device_count()}")
    before = load(request.folder)  # validates the workspace and names before any spawn
    if request.task in before.task_info:
        raise UsageError(f"a task named {request.task!r} exists already in {request.folder}; "
                         f"choose another name")
    # torch logs a warning line when it terminates the surviving ranks; our one sentence
    # below says what happened instead.
    logging.getLogger("torch.multiprocessing.spawn").setLevel(logging.ERROR)
    parent = Path(request.folder).resolve().parent
    with tempfile.TemporaryDirectory(prefix=".colonnade-ddp-", dir=parent) as tmp:
        staging = str(Path(tmp) / "result")
        try:
            mp.start_processes(_spawned, args=(nproc, _free_port(), request, staging, progress),
                               nprocs=nproc, join=True, start_method="spawn")
        except mp.ProcessRaisedException as exc:
            last = [line for line in str(exc).strip().splitlines() if line.strip()][-1]
            raise WorkerFailed(f"worker rank {exc.error_index} failed ({last.strip()}); the "
                               f"workspace is unchanged") from None
        except mp.ProcessExitedException as exc:
            cause = (f"killed by signal {exc.signal_name}" if exc.signal_name
                     else f"exit code {exc.exit_code}")
            raise WorkerFailed(f"worker rank {exc.error_index} stopped ({cause}); the "
                               f"workspace is unchanged") from None
        net = load(staging)
        save(net, request.folder)
    return net.meta["history"][-1]
