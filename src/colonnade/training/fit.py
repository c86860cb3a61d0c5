"""Train the trainable parts of one task; evaluate any task.

Only the parameters the network marks trainable reach the optimizer, so weight decay
and momentum never touch a frozen tensor; frozen parts stay in eval mode because
``ProgressiveNet.train()`` never switches them. Shuffling, dropout and initialisation
draw from seeded generators, so a seed fixes the result.
"""

from __future__ import annotations

import math
import sys
import time
import warnings
from collections.abc import Callable
from dataclasses import asdict, dataclass, field
from typing import Any

import torch
import torch.nn.functional as F
from tqdm.auto import tqdm

from ..errors import ColonnadeError
from ..model.network import ProgressiveNet
from ..model.schema import TrainSpec
from .cache import FrozenActivations, FrozenCache, frozen_cache
from .data import TaskData
from .datasets import Rows, batch_stream, resident_bytes

__all__ = ["TrainRecord", "fit_task", "evaluate", "task_logits", "make_optimizer",
           "EVAL_BATCH", "Transform", "all_task_logits", "EpochProgress"]

EVAL_BATCH = 256  # the batch size of every evaluation, so repeated runs batch alike


class TrainingFailed(ColonnadeError):
    exit_code = 1


@dataclass
class TrainRecord:
    """What a training run did, stored in the manifest."""

    optimizer: str
    lr: float
    weight_decay: float
    batch_size: int
    seed: int
    epochs_run: int
    best_epoch: int
    val_accuracy: float
    val_loss: float
    train_loss: float
    stopped_early: bool
    seconds: float
    curve: list[dict[str, float]] = field(default_factory=list)
    cache: str = ""  # what the frozen-activation cache did (cache.py)

    def to_dict(self) -> dict:
        return asdict(self)


def make_optimizer(params: list[torch.nn.Parameter], train: TrainSpec) -> torch.optim.Optimizer:
    if train.optimizer == "sgd":
        return torch.optim.SGD(params, lr=train.lr, momentum=train.momentum or 0.0,
                               weight_decay=train.weight_decay)
    cls = torch.optim.AdamW if train.optimizer == "adamw" else torch.optim.Adam
    betas = train.betas or (0.9, 0.999)
    return cls(params, lr=train.lr, betas=betas, weight_decay=train.weight_decay)


@torch.no_grad()
def task_logits(net: ProgressiveNet, task: str, x: torch.Tensor | Rows,
                batch_size: int = EVAL_BATCH, cached: FrozenActivations | None = None,
                ) -> torch.Tensor:
    """Logits of ``task`` on ``x`` in eval mode, in fixed batches, on the net's device.

    ``cached`` holds the frozen columns' outputs on these same rows (cache.py).
    """
    was_training = net.training
    net.eval()
    device = net.device
    try:
        parts = [net(x[i:i + batch_size].to(device), task=task,
                     given=None if cached is None else cached.rows(slice(i, i + batch_size)),
                     ).cpu()
                 for i in range(0, x.shape[0], batch_size)]
    finally:
        net.train(was_training)
    if not parts:
        return torch.empty(0, net.task(task).classes)
    return torch.cat(parts)


@torch.no_grad()
def all_task_logits(net: ProgressiveNet, x: torch.Tensor | Rows, batch_size: int = EVAL_BATCH,
                    ) -> dict[str, torch.Tensor]:
    """Every live task's logits on ``x`` through ``forward_all``: each column once per batch.

    Batched like ``task_logits``, so each task's logits are bit-identical to it.
    """
    was_training = net.training
    net.eval()
    device = net.device
    parts: dict[str, list[torch.Tensor]] = {t: [] for t in net.live_tasks}
    try:
        for i in range(0, x.shape[0], batch_size):
            for t, logits in net.forward_all(x[i:i + batch_size].to(device)).items():
                parts[t].append(logits.cpu())
    finally:
        net.train(was_training)
    return {t: torch.cat(chunks) if chunks else torch.empty(0, net.task(t).classes)
            for t, chunks in parts.items()}


def evaluate(net: ProgressiveNet, task: str, x: torch.Tensor | Rows, y: torch.Tensor,
             batch_size: int = EVAL_BATCH, cached: FrozenActivations | None = None,
             ) -> tuple[float, float]:
    """Accuracy and mean cross-entropy of ``task`` on labelled data."""
    logits = task_logits(net, task, x, batch_size, cached)
    if y.numel() == 0:
        return float("nan"), float("nan")
    loss = F.cross_entropy(logits, y).item()
    acc = (logits.argmax(1) == y).double().mean().item()
    return acc, loss


def _batches(n: int, batch_size: int, generator: torch.Generator) -> list[torch.Tensor]:
    order = torch.randperm(n, generator=generator)
    batches = list(order.split(batch_size))
    # A batch of one sample breaks batch norm's training statistics; fold it in.
    if len(batches) > 1 and batches[-1].numel() == 1:
        batches[-2] = torch.cat([batches[-2], batches.pop()])
    return batches


Transform = Callable[[torch.Tensor, int], torch.Tensor]


def fit_task(net: ProgressiveNet, task: str, data: TaskData, train: TrainSpec,
             epochs: int | None = None, seed: int | None = None, progress: bool = True,
             transform: Transform | None = None, cache: bool | None = None,
             cache_mb: float | None = None, ddp: Any = None, label: str | None = None,
             workers: int = 0,
             ) -> TrainRecord:
    """Train the net's trainable parts on ``task`` with early stopping on validation.

    Keeps the epoch with the best validation accuracy (ties: lower loss). ``transform``
    maps each training batch (on the net's device) and the epoch number to the batch
    to train on, e.g. for augmentation; it switches the cache of training rows off.
    ``cache`` and ``cache_mb`` override ``train.cache`` and ``train.cache_mb``.
    ``ddp`` (distributed.DistributedHooks) trains data-parallel: ``data`` is then this
    rank's shard, the trainable parts run wrapped in DistributedDataParallel, and norm
    statistics are synchronised before each validation. ``progress`` draws a bar on a
    terminal and prints one line per epoch otherwise; ``label`` names the run in it.
    ``data`` may be streamed (``Rows``, datasets.py): each batch is then read from disk;
    ``workers`` > 0 reads the next batches in that many DataLoader worker processes.
    """
    params = net.trainable_parameters()
    if ddp is not None:
        train = train.model_copy(update={"batch_size": ddp.batch_size(train.batch_size)})
    if not params:
        raise TrainingFailed("nothing is trainable; grow a column or head before training")
    epochs = epochs or train.epochs
    seed = train.seed if seed is None else seed
    optimizer = make_optimizer(params, train)
    device = net.device
    gen = torch.Generator().manual_seed(seed)
    best = (-1.0, math.inf)
    best_state = None
    best_epoch, stale, curve = 0, 0, []
    start = time.perf_counter()
    frozen = _frozen_cache(net, task, data, train, transform, cache, cache_mb)
    model = ddp.wrap(net, task) if ddp is not None else None
    bar = EpochProgress(label or f"train {task}", epochs) if progress else None
    train_loss = float("nan")
    epoch = 0
    try:
        with torch.random.fork_rng(devices=[]):
            torch.manual_seed(seed)  # dropout masks
            for epoch in range(1, epochs + 1):
                if ddp is not None:
                    ddp.before_epoch(epoch)
                net.train()
                total, count = 0.0, 0
                epoch_start = time.perf_counter()
                batches = _batches(data.n_train, train.batch_size, gen)
                for idx, xb in batch_stream(data.x, batches, workers):
                    xb, yb = xb.to(device), data.y[idx].to(device)
                    if transform is not None:
                        xb = transform(xb, epoch)
                    given = frozen.train_rows(idx)
                    logits = (net(xb, task=task, given=given) if model is None
                              else model(xb, given))
                    loss = F.cross_entropy(logits, yb)
                    if not torch.isfinite(loss):
                        raise TrainingFailed(f"training diverged (loss {loss.item()}) in epoch "
                                             f"{epoch}; lower the learning rate in the spec")
                    optimizer.zero_grad(set_to_none=True)
                    loss.backward()
                    optimizer.step()
                    total += loss.item() * idx.numel()
                    count += idx.numel()
                train_loss = total / max(count, 1)
                if ddp is not None:
                    ddp.sync_buffers(net)
                acc, vloss = evaluate(net, task, data.x_val, data.y_val, cached=frozen.val)
                curve.append({"epoch": epoch, "train_loss": train_loss, "val_accuracy": acc,
                              "val_loss": vloss,
                              "seconds": time.perf_counter() - epoch_start})
                if bar is not None:
                    bar.epoch(epoch, train_loss, acc)
                if acc > best[0] or (acc == best[0] and vloss < best[1]):
                    best, best_epoch, stale = (acc, vloss), epoch, 0
                    best_state = [p.detach().clone() for p in params] + [
                        b.detach().clone() for b in _trainable_buffers(net)]
                else:
                    stale += 1
                    if train.patience and stale >= train.patience:
                        break
    finally:
        frozen.close()
        if bar is not None:
            bar.close()
        net.eval()
    if best_state is not None:
        with torch.no_grad():
            for t, saved in zip(params + _trainable_buffers(net), best_state, strict=True):
                t.copy_(saved)
    return TrainRecord(train.optimizer, train.lr, train.weight_decay, train.batch_size, seed,
                       epoch, best_epoch, best[0], best[1], train_loss,
                       epoch < epochs, time.perf_counter() - start, curve, frozen.note)


class EpochProgress:
    """A progress bar on a terminal; one plain line per epoch when stderr is redirected
    (a log file gets no carriage-return frames)."""

    def __init__(self, label: str, epochs: int, stream: Any = None) -> None:
        self.label, self.epochs = label, epochs
        self.stream = stream if stream is not None else sys.stderr
        self.bar = None
        isatty = getattr(self.stream, "isatty", None)
        if callable(isatty) and isatty():
            self.bar = tqdm(total=epochs, desc=label, unit="epoch", leave=False,
                            file=self.stream)

    def epoch(self, epoch: int, train_loss: float, val_accuracy: float) -> None:
        if self.bar is not None:
            self.bar.set_postfix(loss=f"{train_loss:.4f}", val_acc=f"{val_accuracy:.3f}")
            self.bar.update(1)
            return
        print(f"{self.label}: epoch {epoch}/{self.epochs}, train loss {train_loss:.4f}, "
              f"validation accuracy {val_accuracy:.4f}", file=self.stream, flush=True)

    def close(self) -> None:
        if self.bar is not None:
            self.bar.close()


def _frozen_cache(net: ProgressiveNet, task: str, data: TaskData, train: TrainSpec,
                  transform: Transform | None, cache: bool | None, cache_mb: float | None,
                  ) -> FrozenCache:
    """The frozen columns' outputs on this run's rows, reused every epoch (cache.py).

    ``cache_mb`` bounds the data held in memory and the cache together: the cache keeps
    in memory only what the in-memory samples leave of it, and spills the rest to disk.
    """
    built = time.perf_counter()
    budget = train.cache_mb if cache_mb is None else cache_mb
    held = resident_bytes(data.x, data.x_val) / (1 << 20)
    frozen = frozen_cache(net, task, data.x, data.x_val, train.batch_size, EVAL_BATCH,
                          max(budget - held, 0.0),
                          enabled=train.cache if cache is None else cache,
                          transformed=transform is not None)
    if frozen.train is not None or frozen.val is not None:
        frozen.notes.append(f"built in {time.perf_counter() - built:.2f} s")
    if frozen.off_for_transform:
        warnings.warn(f"training {task}: the frozen-activation cache is off for the training "
                      f"rows, because a transform changes the data every epoch",
                      RuntimeWarning, stacklevel=3)
    return frozen


def _trainable_buffers(net: ProgressiveNet) -> list[torch.Tensor]:
    """Norm statistics of the trainable parts, restored with the best epoch's weights."""
    return [b for part, m in net.part_modules() if net.is_trainable(part) for b in m.buffers()]
