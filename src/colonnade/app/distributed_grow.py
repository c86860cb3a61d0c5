"""Growing one task data-parallel: launch the ranks, train, commit rank 0's result.

Every rank loads the same workspace and grows the same parts from the same seed, so all
start identical; the DDP mechanics are in ``colonnade.training.distributed``. Launched
locally (``grow --nproc N``), rank 0 writes the trained network to a staging folder and
the parent process commits it to the workspace only after every worker has exited
cleanly, so a failed or killed worker leaves the workspace exactly as before. Launched by
``torchrun`` across machines, rank 0 commits after a final barrier.
"""

from __future__ import annotations

import datetime
import logging
import os
import tempfile
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import Any

import torch
import torch.distributed as dist
import torch.multiprocessing as mp

from ..errors import UsageError
from ..evidence.record import Attribution, unchain
from ..files.store import load, save
from ..model.device import resolve_device
from ..model.schema import Spec
from ..training.checks import check_training_data
from ..training.data import TaskData, load_for_spec
from ..training.datasets import subset
from ..training.distributed import (
    DistributedHooks,
    WorkerFailed,
    fault_hook,
    free_port,
    shard_rows,
)
from ..training.growth import grow

__all__ = ["DataOptions", "growth_data", "GrowRequest", "grow_distributed", "run_rank",
           "run_torchrun_rank"]


@dataclass
class DataOptions:
    """How to read a task's data files beyond the path: labels file, bad files, names."""

    labels: str | None = None
    skip_bad: bool = False
    class_names: list[str] | None = None


def growth_data(spec: Spec, train: str | Path, val: str | Path | None, classes: int | None,
                options: DataOptions) -> TaskData:
    """A new task's data as every rank (and a single process) reads it."""
    return load_for_spec(train, spec, classes=classes, val_path=val, labels=options.labels,
                         skip_bad=options.skip_bad, class_names=options.class_names)


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
    data: DataOptions = field(default_factory=lambda: DataOptions())


# Seconds a collective may wait before the process group gives up (torch's default, 30
# minutes, when unset): tests set it short so that a lost sync fails fast with a message.
TIMEOUT_ENV = "COLONNADE_DIST_TIMEOUT_S"


def _timeout() -> datetime.timedelta | None:
    value = os.environ.get(TIMEOUT_ENV)
    return datetime.timedelta(seconds=float(value)) if value else None


def run_rank(rank: int, world: int, request: GrowRequest, staging: str | None,
             progress: bool = True, who: Attribution | None = None,
             ) -> dict[str, Any] | None:
    """One rank's work: grow, train on its shard, and (rank 0) write the result, attributed
    to ``who`` when it commits to the workspace itself (torchrun)."""
    device = resolve_device(request.device)
    backend = "nccl" if device.type == "cuda" else "gloo"
    if device.type == "cuda":
        device = torch.device("cuda", rank % torch.cuda.device_count())
        torch.cuda.set_device(device)
    if not dist.is_initialized():
        dist.init_process_group(backend, rank=rank, world_size=world, timeout=_timeout())
    try:
        net = load(request.folder)
        data = growth_data(net.spec, request.train, request.val, request.classes,
                           request.data)
        found = check_training_data(data.y, data.y_val, data.classes, data.source,
                                    classes_given=request.classes is not None,
                                    warn=rank == 0)  # on the whole data, not a shard
        rows = shard_rows(data.n_train, rank, world, net.spec.train.seed)
        shard = replace(data, x=subset(data.x, rows), y=data.y[rows])
        ddp = DistributedHooks(rank, world, device, fault_hook(rank))
        entry = grow(net, request.task, shard, mode=request.mode, on=request.on,
                     width=request.width, epochs=request.epochs, device=str(device),
                     progress=progress and rank == 0, cache=request.cache,
                     cache_mb=request.cache_mb, target=request.target, ddp=ddp)
        if found.warnings:
            entry["data_warnings"] = list(found.warnings)
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
                save(net, request.folder, who)
        dist.barrier()
    finally:
        dist.destroy_process_group()
    return entry if rank == 0 else None


def run_torchrun_rank(request: GrowRequest, progress: bool = True,
                      who: Attribution | None = None) -> dict[str, Any] | None:
    """This process's rank of a torchrun launch; rank 0 commits to the workspace, as
    ``who`` (the launching command's ``--by``, ``--reason`` and ``--sign``)."""
    rank, world = int(os.environ["RANK"]), int(os.environ["WORLD_SIZE"])
    return run_rank(rank, world, request, None, progress, who if rank == 0 else None)


def _spawned(rank: int, world: int, port: int, request: GrowRequest, staging: str,
             progress: bool) -> None:
    os.environ.update(MASTER_ADDR="127.0.0.1", MASTER_PORT=str(port))
    torch.set_num_threads(max(1, (os.cpu_count() or 1) // world))
    run_rank(rank, world, request, staging, progress)


def grow_distributed(request: GrowRequest, nproc: int, progress: bool = True,
                     who: Attribution | None = None) -> dict[str, Any]:
    """Grow one task with ``nproc`` local ranks; commit only when all of them succeeded."""
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
            mp.start_processes(_spawned, args=(nproc, free_port(), request, staging, progress),
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
        # The staging copy chained the new entries; chain them again in the workspace.
        added = net.meta["history"][len(before.meta["history"]):]
        unchain(added)
        save(net, request.folder, who)
    return next(e for e in reversed(added) if e.get("task") == request.task)
