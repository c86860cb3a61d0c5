"""SHA-256 digests over a canonical serialisation of tensors, files and records.

A seal must name *which* tensor moved, not only that something did, so every tensor
gets its own digest and a closure's digest is taken over the per-tensor records in
sorted key order. A tensor's record is its key, dtype, shape and raw bytes, each
length-prefixed, so no two different tensors (or key/byte splits) serialise alike.
"""

from __future__ import annotations

import hashlib
import json
import struct
from collections.abc import Mapping
from pathlib import Path
from typing import Any

import torch

__all__ = ["tensor_record", "tensor_digest", "closure_digests", "bytes_digest", "file_digest",
           "record_digest", "raw_bytes"]


def raw_bytes(t: torch.Tensor) -> bytes:
    """The tensor's elements as stored, in row-major order (any dtype, also bfloat16)."""
    flat = t.detach().cpu().contiguous().reshape(-1)
    return flat.view(torch.uint8).numpy().tobytes()


def _field(data: bytes) -> bytes:
    return struct.pack("<Q", len(data)) + data


def tensor_record(key: str, t: torch.Tensor) -> bytes:
    """The canonical serialisation of one named tensor: key, dtype, shape, bytes."""
    shape = struct.pack(f"<{t.dim()}Q", *t.shape)
    return (_field(key.encode("utf-8")) + _field(str(t.dtype).encode("ascii"))
            + _field(shape) + _field(raw_bytes(t)))


def tensor_digest(key: str, t: torch.Tensor) -> str:
    return hashlib.sha256(tensor_record(key, t)).hexdigest()


def closure_digests(state: Mapping[str, torch.Tensor]) -> tuple[str, dict[str, str]]:
    """The digest over every tensor in sorted key order, and each tensor's own digest."""
    whole = hashlib.sha256()
    per: dict[str, str] = {}
    for key in sorted(state):
        record = tensor_record(key, state[key])
        whole.update(record)
        per[key] = hashlib.sha256(record).hexdigest()
    return whole.hexdigest(), per


def bytes_digest(data: bytes) -> str:
    return hashlib.sha256(data).hexdigest()


def file_digest(path: str | Path) -> str:
    h = hashlib.sha256()
    with open(path, "rb") as f:
        for chunk in iter(lambda: f.read(1 << 20), b""):
            h.update(chunk)
    return h.hexdigest()


def record_digest(record: Mapping[str, Any], skip: tuple[str, ...] = ()) -> str:
    """Digest of plain data (a manifest entry) as sorted, compact JSON, minus ``skip``."""
    data = {k: v for k, v in record.items() if k not in skip}
    text = json.dumps(data, sort_keys=True, separators=(",", ":"), ensure_ascii=True)
    return hashlib.sha256(text.encode("ascii")).hexdigest()
