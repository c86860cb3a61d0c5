"""Train the trainable parts of one task; evaluate any task.

Only the parameters the network marks trainable reach the optimizer, so weight decay
and momentum never touch a frozen tensor; frozen parts stay in eval mode because
``ProgressiveNet.train()`` never switches them. Shuffling, dropout and initialisation
draw from seeded generators, so a seed fixes the result.
"""

from __future__ import annotations

import math
import time
from dataclasses import asdict, dataclass, field

import torch
import torch.nn.functional as F

from .data import TaskData
from .errors import ColonnadeError
from .network import ProgressiveNet
from .spec import TrainSpec

__all__ = ["TrainRecord", "fit_task", "evaluate", "task_logits", "make_optimizer",
           "EVAL_BATCH"]

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
def task_logits(net: ProgressiveNet, task: str, x: torch.Tensor,
                batch_size: int = EVAL_BATCH) -> torch.Tensor:
    """Logits of ``task`` on ``x`` in eval mode, in fixed batches, on the net's device."""
    was_training = net.training
    net.eval()
    device = net.device
    try:
        parts = [net(x[i:i + batch_size].to(device), task=task).cpu()
                 for i in range(0, x.shape[0], batch_size)]
    finally:
        net.train(was_training)
    if not parts:
        return torch.empty(0, net.task(task).classes)
    return torch.cat(parts)


def evaluate(net: ProgressiveNet, task: str, x: torch.Tensor, y: torch.Tensor,
             batch_size: int = EVAL_BATCH) -> tuple[float, float]:
    """Accuracy and mean cross-entropy of ``task`` on labelled data."""
    logits = task_logits(net, task, x, batch_size)
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


def fit_task(net: ProgressiveNet, task: str, data: TaskData, train: TrainSpec,
             epochs: int | None = None, seed: int | None = None, progress: bool = True,
             ) -> TrainRecord:
    """Train the net's trainable parts on ``task`` with early stopping on validation.

    Keeps the epoch with the best validation accuracy (ties: lower loss).
    """
    params = net.trainable_parameters()
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
    bar = None
    if progress:
        from tqdm.auto import tqdm

        bar = tqdm(total=epochs, desc=f"train {task}", unit="epoch", leave=False)
    train_loss = float("nan")
    epoch = 0
    try:
        with torch.random.fork_rng(devices=[]):
            torch.manual_seed(seed)  # dropout masks
            for epoch in range(1, epochs + 1):
                net.train()
                total, count = 0.0, 0
                for idx in _batches(data.n_train, train.batch_size, gen):
                    xb, yb = data.x[idx].to(device), data.y[idx].to(device)
                    loss = F.cross_entropy(net(xb, task=task), yb)
                    if not torch.isfinite(loss):
                        raise TrainingFailed(f"training diverged (loss {loss.item()}) in epoch "
                                             f"{epoch}; lower the learning rate in the spec")
                    optimizer.zero_grad(set_to_none=True)
                    loss.backward()
                    optimizer.step()
                    total += loss.item() * idx.numel()
                    count += idx.numel()
                train_loss = total / max(count, 1)
                acc, vloss = evaluate(net, task, data.x_val, data.y_val)
                curve.append({"epoch": epoch, "train_loss": train_loss, "val_accuracy": acc,
                              "val_loss": vloss})
                if bar is not None:
                    bar.set_postfix(loss=f"{train_loss:.4f}", val_acc=f"{acc:.3f}")
                    bar.update(1)
                if acc > best[0] or (acc == best[0] and vloss < best[1]):
                    best, best_epoch, stale = (acc, vloss), epoch, 0
                    best_state = [p.detach().clone() for p in params] + [
                        b.detach().clone() for b in _trainable_buffers(net)]
                else:
                    stale += 1
                    if train.patience and stale >= train.patience:
                        break
    finally:
        if bar is not None:
            bar.close()
        net.eval()
    if best_state is not None:
        with torch.no_grad():
            for t, saved in zip(params + _trainable_buffers(net), best_state):
                t.copy_(saved)
    return TrainRecord(train.optimizer, train.lr, train.weight_decay, train.batch_size, seed,
                       epoch, best_epoch, best[0], best[1], train_loss,
                       epoch < epochs, time.perf_counter() - start, curve)


def _trainable_buffers(net: ProgressiveNet) -> list[torch.Tensor]:
    """Norm statistics of the trainable parts, restored with the best epoch's weights."""
    return [b for part, m in net.part_modules() if net.is_trainable(part) for b in m.buffers()]
