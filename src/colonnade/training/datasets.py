"""Samples read on demand, so a data set larger than memory can train, seal and predict.

Training code indexes its data the way it indexes a tensor: ``x[idx]`` with an index
tensor for a shuffled batch, ``x[i:j]`` for an evaluation chunk, ``x.shape[0]`` for the
sample count. ``Rows`` keeps that contract for data that stays on disk (a ``.npy`` file
read by position, a folder of files decoded per sample, a user's torch ``Dataset``): each
index returns a fresh float32 tensor of just those rows, and nothing else is held. So
fitting, evaluation and the frozen-activation cache need no second code path, and an
in-memory tensor keeps exactly today's computation.

``batch_stream`` hands the batches of an epoch to a torch ``DataLoader`` when worker
processes are asked for: the batches are fixed index lists from the seeded shuffle, and
the loader returns them in that order, so a seed still fixes the result.
"""

from __future__ import annotations

from collections.abc import Callable, Iterator, Sequence
from typing import Any

import numpy as np
import torch
from torch.utils.data import DataLoader, Dataset

from ..errors import DataError

__all__ = ["Rows", "SubsetRows", "DatasetRows", "RowsDataset", "as_index", "subset",
           "row_count", "resident_bytes", "materialize", "batch_stream", "checked_float32",
           "FLOAT32_MAX"]

FLOAT32_MAX = float(np.finfo(np.float32).max)


def as_index(idx: Any, n: int) -> np.ndarray:
    """Row numbers as an int64 array from a slice, an index tensor, an array or an int."""
    if isinstance(idx, slice):
        return np.arange(*idx.indices(n), dtype=np.int64)
    if isinstance(idx, torch.Tensor):
        idx = idx.detach().cpu().numpy()
    index = np.asarray(idx, dtype=np.int64).reshape(-1)
    if index.size and (index.min() < -n or index.max() >= n):
        raise IndexError(f"row index out of range for {n} rows")
    return np.where(index < 0, index + n, index)


def checked_float32(values: np.ndarray, where: Callable[[int], str],
                    notes: list[str] | None = None) -> np.ndarray:
    """``values`` (rows first) as float32, refusing what float32 cannot hold.

    Integers and float16 convert exactly enough to train on (a note says so); float64
    beyond float32's range would turn into infinities, so it is refused naming the row
    and the feature; NaN and infinities are refused the same way. ``where(row)`` names
    the row for the message (a file and line, or a file).
    """
    if values.dtype.kind not in "fiub":
        raise DataError(f"{where(0)}: values must be numbers, got {values.dtype}; convert "
                        f"them to float32")
    if values.dtype == np.float64:
        with np.errstate(invalid="ignore"):
            too_big = np.abs(values) > FLOAT32_MAX
        if too_big.any():
            row, feature = _first(too_big)
            raise DataError(f"{where(row)}: feature {feature} holds "
                            f"{values.reshape(values.shape[0], -1)[row, feature]:.6g}, beyond "
                            f"the float32 range (+-{FLOAT32_MAX:.4g}); rescale that feature")
    if values.dtype != np.float32 and notes is not None:
        note = f"converted {values.dtype} values to float32"
        if note not in notes:
            notes.append(note)
    out = values.astype(np.float32, copy=False)
    finite = np.isfinite(out)
    if not finite.all():
        row, feature = _first(~finite)
        bad = int(np.count_nonzero(~finite))
        raise DataError(f"{where(row)}: holds {bad} non-finite value(s) (NaN or inf), the "
                        f"first in feature {feature}; clean or drop those samples")
    return out


def _first(mask: np.ndarray) -> tuple[int, int]:
    flat = mask.reshape(mask.shape[0], -1)
    row = int(np.flatnonzero(flat.any(axis=1))[0])
    return row, int(np.flatnonzero(flat[row])[0])


class Rows:
    """Samples of one shape read on demand: ``rows[idx]`` is a float32 tensor of those rows.

    Subclasses implement ``read(index)``: the rows at ``index`` (an int64 array, any
    order, repeats allowed) as a float32 array ``[len(index), *sample_shape]``. Reading
    must be deterministic and safe in a forked or spawned worker process.
    """

    def __init__(self, n: int, sample_shape: Sequence[int], source: str) -> None:
        self.n = int(n)
        self.sample_shape = tuple(int(s) for s in sample_shape)
        self.source = source
        self.notes: list[str] = []

    def read(self, index: np.ndarray) -> np.ndarray:
        raise NotImplementedError

    @property
    def shape(self) -> torch.Size:
        return torch.Size((self.n, *self.sample_shape))

    @property
    def ndim(self) -> int:
        return 1 + len(self.sample_shape)

    @property
    def dtype(self) -> torch.dtype:
        return torch.float32

    @property
    def nbytes(self) -> int:
        """Bytes the rows would take as one float32 tensor."""
        return self.n * int(np.prod(self.sample_shape, dtype=np.int64)) * 4

    def __len__(self) -> int:
        return self.n

    def __getitem__(self, idx: Any) -> torch.Tensor:
        index = as_index(idx, self.n)
        if index.size == 0:
            return torch.empty((0, *self.sample_shape), dtype=torch.float32)
        return torch.from_numpy(np.ascontiguousarray(self.read(index)))

    def subset(self, index: Any) -> Rows:
        return SubsetRows(self, as_index(index, self.n))

    def materialize(self, chunk: int = 256) -> torch.Tensor:
        """Every row as one tensor, read in chunks (only for data known to fit)."""
        out = torch.empty((self.n, *self.sample_shape), dtype=torch.float32)
        for i in range(0, self.n, chunk):
            out[i:i + chunk] = self[i:i + chunk]
        return out

    def __repr__(self) -> str:
        shape = list(self.sample_shape)
        return f"{type(self).__name__}({self.source!r}, n={self.n}, shape={shape})"


class SubsetRows(Rows):
    """Some rows of another ``Rows``, in the given order (a train/validation split)."""

    def __init__(self, base: Rows, index: np.ndarray) -> None:
        if isinstance(base, SubsetRows):  # flatten, so reads stay one hop
            index, base = base.index[index], base.base
        super().__init__(len(index), base.sample_shape, base.source)
        self.base, self.index = base, np.asarray(index, dtype=np.int64)
        self.notes = base.notes

    def read(self, index: np.ndarray) -> np.ndarray:
        return self.base.read(self.index[index])


class DatasetRows(Rows):
    """The inputs of a map-style torch ``Dataset`` of ``(x, y)`` pairs, read per sample."""

    def __init__(self, dataset: Dataset, n: int, sample_shape: Sequence[int], name: str,
                 ) -> None:
        super().__init__(n, sample_shape, name)
        self.dataset = dataset

    def read(self, index: np.ndarray) -> np.ndarray:
        out = np.empty((len(index), *self.sample_shape), dtype=np.float32)
        for i, row in enumerate(index):
            x = self.dataset[int(row)][0]
            x = x.detach().cpu().numpy() if isinstance(x, torch.Tensor) else np.asarray(x)
            if tuple(x.shape) != self.sample_shape:
                raise DataError(f"{self.source}: sample {int(row)} has shape {list(x.shape)}, "
                                f"but the spec's input is {list(self.sample_shape)}")
            out[i] = checked_float32(x[None], lambda _r, row=row: f"{self.source}: sample "
                                     f"{int(row)}", self.notes)[0]
        return out


def subset(x: torch.Tensor | Rows, index: Any) -> torch.Tensor | Rows:
    """Rows ``index`` of ``x``: a tensor copy for a tensor, a lazy view for ``Rows``."""
    if isinstance(x, Rows):
        return x.subset(index)
    return x[torch.as_tensor(as_index(index, int(x.shape[0])))]


def row_count(x: torch.Tensor | Rows) -> int:
    return int(x.shape[0])


def resident_bytes(*xs: torch.Tensor | Rows | None) -> int:
    """Bytes of the given data held in memory (``Rows`` hold none)."""
    return sum(x.element_size() * x.numel() for x in xs if isinstance(x, torch.Tensor))


def materialize(x: torch.Tensor | Rows) -> torch.Tensor:
    return x.materialize() if isinstance(x, Rows) else x


class RowsDataset(Dataset):
    """A torch ``Dataset`` over ``Rows``: a whole batch is one read (``__getitems__``)."""

    def __init__(self, rows: Rows) -> None:
        self.rows = rows

    def __len__(self) -> int:
        return len(self.rows)

    def __getitem__(self, i: int) -> torch.Tensor:
        return self.rows[[i]][0]

    def __getitems__(self, indices: list[int]) -> torch.Tensor:
        return self.rows[np.asarray(indices, dtype=np.int64)]


def _whole_batch(batch: torch.Tensor) -> torch.Tensor:
    return batch  # __getitems__ already stacked the batch; nothing to collate


def batch_stream(x: torch.Tensor | Rows, batches: list[torch.Tensor], workers: int = 0,
                 ) -> Iterator[tuple[torch.Tensor, torch.Tensor]]:
    """``(idx, x[idx])`` for each index batch, in order.

    A tensor is indexed directly (exactly as before there were streamed sources). For
    ``Rows`` with ``workers`` > 0, a ``DataLoader`` reads the next batches in worker
    processes while this one trains; the batch order is the given one either way.
    """
    if workers <= 0 or not isinstance(x, Rows):
        for idx in batches:
            yield idx, x[idx]
        return
    # The loader draws its workers' base seed from ``generator``: without one it would
    # draw from torch's global generator and move the dropout masks of training.
    loader = DataLoader(RowsDataset(x), batch_sampler=[b.tolist() for b in batches],
                        num_workers=workers, collate_fn=_whole_batch,
                        persistent_workers=False, prefetch_factor=2,
                        generator=torch.Generator().manual_seed(0))
    yield from zip(batches, loader, strict=True)
