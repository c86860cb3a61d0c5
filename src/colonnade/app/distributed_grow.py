"""Growing one task data-parallel: launch the ranks, train, commit rank 0's result.

Every rank loads the same workspace and grows the same parts from the same seed, so all
start identical; the DDP mechanics are in ``colonnade.training.distributed``. Launched
locally (``grow --nproc N``), rank 0 writes the trained network to a staging folder and
the parent process commits it to the workspace only after every worker has exited
cleanly, so a failed or killed worker leaves the workspace exactly as before. Launched by
``torchrun`` across machines, rank 0 commits after a final barrier.

What a killed parent leaves: the staging folder is a dot-folder inside the workspace
(``.colonnade-ddp-<pid>-<random>``, never read as part of it), so nothing is written
beside the workspace; the next writer of the workspace, or ``colonnade recover``,
removes it (``files.staging``: it was made under the writer lock, so whoever holds the
lock next knows that its maker is gone). The workers ask the kernel to kill them when
their parent dies (Linux's ``prctl(PR_SET_PDEATHSIG)``), so none is left running alone.
"""

from __future__ import annotations

import ctypes
import ctypes.util
import datetime
import logging
import os
import shutil
import signal
import sys
import threading
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import Any

import torch
import torch.distributed as dist
import torch.multiprocessing as mp

from ..errors import UsageError
from ..evidence.record import Attribution, unchain
from ..files.lock import writer_lock
from ..files.staging import make_staging
from ..files.store import LOADED_HEAD, load, save
from ..model.device import resolve_device
from ..model.schema import Spec
from ..training.checks import check_training_data
from ..training.data import TaskData, load_for_spec
from ..training.datasets import subset
from ..training.distributed import (
    DistributedHooks,
    WorkerFailed,
    fault_hook,
    shard_rows,
)
from ..training.growth import grow
from .transaction import tell_waiting, wait_seconds

__all__ = ["DataOptions", "growth_data", "GrowRequest", "grow_distributed", "run_rank",
           "run_torchrun_rank", "rank_threads"]


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
RENDEZVOUS_FILE = "rendezvous"  # in the staging folder: where the --nproc ranks meet


def _timeout() -> datetime.timedelta | None:
    value = os.environ.get(TIMEOUT_ENV)
    return datetime.timedelta(seconds=float(value)) if value else None


def run_rank(rank: int, world: int, request: GrowRequest, staging: str | None,
             progress: bool = True, who: Attribution | None = None,
             meeting: dist.Store | None = None) -> dict[str, Any] | None:
    """One rank's work: grow, train on its shard, and (rank 0) write the result, attributed
    to ``who`` when it commits to the workspace itself (torchrun). The ranks meet through
    the ``meeting`` store, or through the launcher's environment when it is None."""
    device = resolve_device(request.device)
    backend = "nccl" if device.type == "cuda" else "gloo"
    if device.type == "cuda":
        device = torch.device("cuda", rank % torch.cuda.device_count())
        torch.cuda.set_device(device)
    if not dist.is_initialized():
        dist.init_process_group(backend, store=meeting, rank=rank, world_size=world,
                                timeout=_timeout())
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


# prctl's option number for "send me this signal when my parent dies", from the Linux
# headers (<linux/prctl.h>: PR_SET_PDEATHSIG = 1) and the prctl(2) manual page.
_PR_SET_PDEATHSIG = 1


def _die_with_parent(parent: int) -> None:
    """Have the kernel kill this worker when the process that spawned it dies (Linux).

    prctl(2) says the signal is sent when the parent thread exits; the parent's pid is
    checked afterwards because the parent may have died before the call. Elsewhere there
    is no such call and nothing is done: a worker whose parent died then fails at its
    next collective (the process group's timeout) instead.
    """
    if not sys.platform.startswith("linux"):
        return
    libc = ctypes.CDLL(ctypes.util.find_library("c") or "libc.so.6", use_errno=True)
    if libc.prctl(_PR_SET_PDEATHSIG, signal.SIGKILL, 0, 0, 0) != 0:
        return  # not allowed here (a sandbox): the collectives' timeout still applies
    if os.getppid() != parent:
        os._exit(1)


def rank_threads(world: int) -> int:
    """Intra-op threads of one local rank: ``OMP_NUM_THREADS`` when it is set to a whole
    number (torch reads it at start-up, and torchrun sets it for its workers), else this
    machine's cores shared among the ranks. Different thread counts may round differently
    (DESIGN invariant 8), so the variable lets an --nproc run match a torchrun launch."""
    text = os.environ.get("OMP_NUM_THREADS", "").strip()
    if text.isdigit() and int(text) > 0:
        return int(text)
    return max(1, (os.cpu_count() or 1) // world)


def _spawned(rank: int, world: int, request: GrowRequest, staging: str, progress: bool,
             parent: int) -> None:
    _die_with_parent(parent)
    torch.set_num_threads(rank_threads(world))
    # The ranks meet through a file in the staging folder (torch's FileStore, given as a
    # store, so no URL has to quote the folder's name), not a TCP port: a port found free
    # and bound moments later can be taken by another process meanwhile, and the staging
    # folder is this run's own and removed with it.
    meeting = dist.FileStore(str(Path(staging).parent / RENDEZVOUS_FILE), world)
    run_rank(rank, world, request, staging, progress, meeting=meeting)


def _run_workers(nproc: int, args: tuple[Any, ...]) -> None:
    """Start ``nproc`` workers running ``_spawned(rank, *args)`` and wait for all of them.

    Ctrl-C on a terminal reaches every process of the foreground group, workers included,
    and a worker still importing torch would print a traceback. So the workers are started
    with SIGINT ignored (a disposition a new process inherits, and that Python keeps), and
    only this process answers Ctrl-C: it kills the workers, waits for them, and lets the
    KeyboardInterrupt go on (the staging folder is removed by the caller). A Ctrl-C in the
    moment the processes are being created is not seen; pressing it again stops the run.
    """
    main_thread = threading.current_thread() is threading.main_thread()
    previous = signal.signal(signal.SIGINT, signal.SIG_IGN) if main_thread else None
    try:
        context = mp.start_processes(_spawned, args=args, nprocs=nproc, join=False,
                                     start_method="spawn")
    finally:
        if main_thread:
            signal.signal(signal.SIGINT, previous if previous is not None else signal.SIG_DFL)
    try:
        while not context.join():
            pass
    except BaseException:
        for process in context.processes:  # join() kills the others only on a failure
            if process.is_alive():
                process.kill()
        for process in context.processes:
            process.join()
        raise


def grow_distributed(request: GrowRequest, nproc: int, progress: bool = True,
                     who: Attribution | None = None) -> dict[str, Any]:
    """Grow one task with ``nproc`` local ranks; commit only when all of them succeeded."""
    if nproc < 2:
        raise UsageError(f"--nproc must be at least 2 for data-parallel training, got {nproc}")
    if request.device and request.device.startswith("cuda") and (
            torch.cuda.device_count() < nproc):
        raise UsageError(f"--nproc {nproc} with --device cuda needs {nproc} GPUs, this "
                         f"machine has {torch.cuda.device_count()}")
    # held from the first read to the commit
    with writer_lock(request.folder, "grow", wait_seconds(), tell_waiting):
        return _grow_locked(request, nproc, progress, who)


def _grow_locked(request: GrowRequest, nproc: int, progress: bool,
                 who: Attribution | None) -> dict[str, Any]:
    before = load(request.folder)  # validates the workspace and names before any spawn
    if request.task in before.task_info:
        raise UsageError(f"a task named {request.task!r} exists already in {request.folder}; "
                         f"choose another name")
    # torch logs a warning line when it terminates the surviving ranks; our one sentence
    # below says what happened instead.
    logging.getLogger("torch.multiprocessing.spawn").setLevel(logging.ERROR)
    # Made and removed under the writer lock, so a later writer knows it is stale.
    tmp = make_staging(request.folder)
    try:
        staging = str(Path(tmp) / "result")
        try:
            _run_workers(nproc, (nproc, request, staging, progress, os.getpid()))
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
        net.meta[LOADED_HEAD] = before.meta[LOADED_HEAD]  # grown from that generation
        save(net, request.folder, who)
    finally:
        shutil.rmtree(tmp, ignore_errors=True)
    return next(e for e in reversed(added) if e.get("task") == request.task)
