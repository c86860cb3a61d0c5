"""Frozen-activation cache: outputs of constant columns, computed once per training run.

While a new column (or head) trains, the earlier columns it reads have no trainable
tensor and run in eval mode (no dropout, fixed norm statistics), so their block outputs
on the training rows are the same in every epoch. Computing them once and passing them
to ``net(x, task=..., given=...)`` leaves each training step with only the new parts'
forward and backward. Training rows are computed in chunks of the training batch size
(the last chunk overlaps the one before so that it is full too), so every matrix product
sees as many rows as a mini-batch does; where the kernels' results do not depend on
which rows share a batch of that size, training with and without the cache gives
bit-identical weights. Where they do (on this project's CPU build, for example, a
Linear layer whose output has only a handful of features), the frozen outputs differ in
the last bits and the weights within float rounding, amplified by the optimizer;
tests/test_cache.py measures both cases and the README records the figures.

The cache lives in the network's device memory up to a cap and spills whole arrays to
numpy memory-mapped files in a temporary folder beyond it; ``close()`` removes them.
"""

from __future__ import annotations

import shutil
import tempfile
import weakref
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import torch

from ..model.network import ProgressiveNet

__all__ = ["MB", "constant_columns", "needed_outputs", "FrozenActivations", "FrozenCache",
           "frozen_cache"]

MB = 1 << 20  # cache_mb counts mebibytes


def constant_columns(net: ProgressiveNet, task: str) -> list[int]:
    """Closure columns whose outputs cannot change while the trainable parts train.

    A column is constant when it and every adapter into it are frozen and each of those
    adapters reads a constant column. Frozen parts always run in eval mode.
    """
    constant: list[int] = []
    closure = net.closure(task)
    for k in closure.columns:  # sorted: sources come before their targets
        if net.is_trainable(f"column:{k}"):
            continue
        keys = [key for b in range(closure.depth(k))
                for key, _ in net.adapters_into_block(k, b)]
        if all(not net.is_trainable(f"adapter:{key}")
               and all(j in constant for j in net.adapter_sources(key)) for key in keys):
            constant.append(k)
    return constant


def needed_outputs(net: ProgressiveNet, task: str) -> dict[int, tuple[int, ...]]:
    """Block outputs of constant columns that the task's other parts read: column -> blocks."""
    constant = set(constant_columns(net, task))
    needed: dict[int, set[int]] = {}
    closure = net.closure(task)
    for k in closure.columns:
        if k in constant:
            continue
        for b in range(closure.depth(k)):
            for key, _ in net.adapters_into_block(k, b):
                for j in net.adapter_sources(key):  # several for a joint adapter
                    if j in constant:
                        needed.setdefault(j, set()).add(net.adapter_reads(key, b - 1, j))
    info = net.task(task)
    readers = [(info.column, net.head_reads(task))] + [
        (j, net.adapter_reads(key, len(net.columns[j].blocks) - 1, j))
        for key, _ in net.adapters_into_head(task) for j in net.adapter_sources(key)]
    for j, index in readers:
        if j in constant:
            needed.setdefault(j, set()).add(index)
    return {k: tuple(sorted(v)) for k, v in sorted(needed.items())}


class FrozenActivations:
    """Block outputs of a task's constant columns on fixed rows ``x``, computed once.

    ``rows(idx)`` returns the ``given`` mapping for ``net(x[idx], task=..., given=...)``:
    every constant closure column maps to its list of block outputs, with ``None`` for
    blocks nothing reads (those columns are then skipped, not recomputed). ``chunk`` is
    how many rows each forward sees; use the batch size of the calls that it replaces.
    ``full_last``: compute the last chunk as the last ``chunk`` rows, overlapping the one
    before, so every row is computed in a batch of ``chunk`` rows (for shuffled training
    batches); without it the chunks are exactly ``x[i:i + chunk]`` (for evaluation).
    """

    def __init__(self, net: ProgressiveNet, task: str, x: torch.Tensor, chunk: int,
                 cap_bytes: int, folder: str | Path | None = None,
                 full_last: bool = False) -> None:
        self.task = task
        self.n = int(x.shape[0])
        self.columns = constant_columns(net, task)
        self.needed = needed_outputs(net, task)
        self.depths = {k: net.closure(task).depth(k) for k in self.columns}
        self.blocks = {k: len(net.columns[k].blocks) for k in self.columns}
        self.device = net.device
        self.bytes_in_memory = 0
        self.bytes_on_disk = 0
        self._folder_root = folder
        self._folder: Path | None = None
        self._memory: dict[tuple[int, int], torch.Tensor] = {}
        self._disk: dict[tuple[int, int], tuple[np.memmap, torch.dtype, tuple[int, ...]]] = {}
        self._finalizer: weakref.finalize | None = None
        try:
            self._fill(net, x, chunk, cap_bytes, full_last)
        except BaseException:
            self.close()
            raise

    # ----------------------------------------------------------------- building
    def _allocate(self, key: tuple[int, int], sample: torch.Tensor, cap_bytes: int) -> None:
        shape = tuple(sample.shape[1:])
        row_bytes = sample[:1].numel() * sample.element_size()
        nbytes = self.n * row_bytes
        if self.bytes_in_memory + nbytes <= cap_bytes:
            self._memory[key] = torch.empty((self.n, *shape), dtype=sample.dtype,
                                            device=self.device)
            self.bytes_in_memory += nbytes
            return
        if self._folder is None:
            self._folder = Path(tempfile.mkdtemp(prefix="colonnade-cache-",
                                                 dir=self._folder_root))
            self._finalizer = weakref.finalize(self, shutil.rmtree, self._folder, True)
        path = self._folder / f"c{key[0]}_b{key[1]}.bin"
        # Raw bytes per row, so any torch dtype (also bfloat16) can be stored.
        array = np.memmap(path, dtype=np.uint8, mode="w+", shape=(self.n, row_bytes))
        self._disk[key] = (array, sample.dtype, shape)
        self.bytes_on_disk += nbytes

    def _store(self, key: tuple[int, int], start: int, value: torch.Tensor) -> None:
        if key in self._memory:
            self._memory[key][start:start + value.shape[0]] = value
            return
        array, _, _ = self._disk[key]
        raw = value.detach().cpu().contiguous().reshape(value.shape[0], -1)
        array[start:start + value.shape[0]] = raw.view(torch.uint8).numpy()

    @torch.no_grad()
    def _fill(self, net: ProgressiveNet, x: torch.Tensor, chunk: int, cap_bytes: int,
              full_last: bool) -> None:
        was_training = net.training
        net.eval()
        try:
            for start in range(0, self.n, chunk):
                stop = min(start + chunk, self.n)
                first = max(0, stop - chunk) if full_last else start
                outs = net.run_columns(x[first:stop].to(self.device), self.columns,
                                       depths=self.depths)
                for k, blocks in self.needed.items():
                    for b in blocks:
                        if start == 0:
                            self._allocate((k, b), outs[k][b], cap_bytes)
                        self._store((k, b), start, outs[k][b][start - first:])
        finally:
            net.train(was_training)
        for array, _, _ in self._disk.values():
            array.flush()

    # ----------------------------------------------------------------- reading
    def _read(self, key: tuple[int, int], idx: torch.Tensor | slice) -> torch.Tensor:
        if key in self._memory:
            store = self._memory[key]
            if isinstance(idx, slice):
                return store[idx]
            return store.index_select(0, idx.to(store.device))  # faster than store[idx]
        array, dtype, shape = self._disk[key]
        rows = array[idx if isinstance(idx, slice) else idx.cpu().numpy()]
        value = torch.from_numpy(np.array(rows, copy=True)).view(dtype)  # own the memory
        return value.reshape(rows.shape[0], *shape).to(self.device)

    def rows(self, idx: torch.Tensor | slice) -> dict[int, list[torch.Tensor | None]]:
        """The ``given`` mapping for the rows ``idx`` (an index tensor or a slice)."""
        given: dict[int, list[torch.Tensor | None]] = {}
        for k in self.columns:
            outs: list[torch.Tensor | None] = [None] * self.blocks[k]
            for b in self.needed.get(k, ()):
                outs[b] = self._read((k, b), idx)
            given[k] = outs
        return given

    @property
    def folder(self) -> Path | None:
        """The temporary folder of spilled arrays, while it exists."""
        return self._folder

    def close(self) -> None:
        """Drop the arrays and remove the spill folder."""
        self._memory.clear()
        self._disk.clear()  # the maps close when the last reference goes
        if self._finalizer is not None:
            self._finalizer()  # removes the folder once
        self._folder = None

    def __enter__(self) -> FrozenActivations:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()


@dataclass
class FrozenCache:
    """The caches of one training run: training rows, validation rows, and what was done."""

    train: FrozenActivations | None = None
    val: FrozenActivations | None = None
    notes: list[str] = field(default_factory=list)
    off_for_transform: bool = False  # training rows would have been cached but for it

    @property
    def note(self) -> str:
        return "; ".join(self.notes)

    def train_rows(self, idx: torch.Tensor) -> dict[int, list[torch.Tensor | None]] | None:
        return None if self.train is None else self.train.rows(idx)

    def close(self) -> None:
        for part in (self.train, self.val):
            if part is not None:
                part.close()

    def __enter__(self) -> FrozenCache:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()


def _describe(part: FrozenActivations) -> str:
    where = f"{part.bytes_in_memory / MB:.1f} MiB in memory"
    if part.bytes_on_disk:
        where += f" + {part.bytes_on_disk / MB:.1f} MiB spilled to disk"
    return where


def frozen_cache(net: ProgressiveNet, task: str, x: torch.Tensor, x_val: torch.Tensor,
                 batch_size: int, eval_batch: int, cache_mb: float, enabled: bool = True,
                 transformed: bool = False, folder: str | Path | None = None) -> FrozenCache:
    """Build the caches for training ``task`` on ``x`` with validation on ``x_val``.

    Training rows are not cached when ``transformed`` (the data changes per epoch);
    validation rows still are, as evaluation never transforms them.
    """
    cache = FrozenCache()
    if not enabled:
        cache.notes.append("cache off (train.cache is false)")
        return cache
    if not needed_outputs(net, task):
        cache.notes.append("cache off (no frozen column to reuse)")
        return cache
    cap = int(cache_mb * MB)
    try:
        if transformed:
            cache.off_for_transform = True
            cache.notes.append("training rows not cached: the data is transformed per epoch, "
                               "so frozen outputs differ each epoch")
        else:
            cache.train = FrozenActivations(net, task, x, batch_size, cap, folder,
                                            full_last=True)
            cap -= cache.train.bytes_in_memory
            cache.notes.append(f"training rows cached: {_describe(cache.train)}")
        if x_val.shape[0]:
            cache.val = FrozenActivations(net, task, x_val, eval_batch, max(cap, 0), folder)
            cache.notes.append(f"validation rows cached: {_describe(cache.val)}")
    except BaseException:
        cache.close()
        raise
    return cache
