"""How much memory a network may ask for, measured from its shapes before it is built.

A spec or a manifest is a few lines of text, and a few lines can ask for terabytes
(``dense: 1099511627776``, ``width: 1e9``): building that would end in an allocation
failure deep inside torch, or in the kernel killing the process. So every network is
first built on torch's ``meta`` device, where modules get their shapes but no storage,
its tensors are counted with ``numel()`` and ``element_size()`` (torch's own accounting),
and only a network that fits the budget is built for real.

The budget is derived from the machine: half of its memory (the smaller of the physical
memory and the process's address-space limit, ``RLIMIT_AS``, when one is set). Loading
holds a workspace's weights file and the tensors built from it at the same time, so a
network past that half could not be loaded here at all; a legitimately big network on a
big machine still loads. The same budget bounds one sample's largest activation in the
column template, which every forward pass allocates for each sample.
"""

from __future__ import annotations

import os
from collections.abc import Callable, Iterable

import torch
import torch.nn as nn

from ..errors import ColonnadeError

__all__ = ["machine_memory", "tensor_budget", "measured_bytes", "check_tensor_bytes",
           "check_activation", "readable_bytes"]

# Used when the operating system does not say how much memory it has (not Linux or macOS).
_UNKNOWN_MEMORY = 1 << 40


def machine_memory() -> int:
    """Bytes of memory this process can use: physical memory, or less under RLIMIT_AS."""
    try:
        memory = os.sysconf("SC_PHYS_PAGES") * os.sysconf("SC_PAGE_SIZE")
    except (AttributeError, ValueError, OSError):
        memory = _UNKNOWN_MEMORY
    try:
        import resource  # POSIX only; absent on Windows
    except ImportError:
        return memory
    soft, _ = resource.getrlimit(resource.RLIMIT_AS)
    if soft != resource.RLIM_INFINITY and soft > 0:
        memory = min(memory, soft)
    return memory


def tensor_budget() -> int:
    """Bytes a network's tensors may take: half of ``machine_memory()`` (see above)."""
    return machine_memory() // 2


def readable_bytes(n: int) -> str:
    """``n`` bytes as a short figure (binary units: KiB, MiB, GiB, TiB, ...)."""
    size = float(n)
    for unit in ("bytes", "KiB", "MiB", "GiB", "TiB", "PiB"):
        if size < 1024 or unit == "PiB":
            return f"{size:.0f} {unit}" if unit == "bytes" else f"{size:.1f} {unit}"
        size /= 1024
    raise AssertionError("unreachable")


def _tensor_bytes(module: nn.Module) -> int:
    tensors: Iterable[torch.Tensor] = [*module.parameters(), *module.buffers()]
    return sum(t.numel() * t.element_size() for t in tensors)


def measured_bytes(build: Callable[[], nn.Module]) -> int:
    """Bytes of the parameters and buffers of ``build()``, built on the meta device.

    Modules passed in already built (an adopted column) count with their real size.
    A shape torch cannot even represent (more elements than an int64 holds) raises
    OverflowError, RuntimeError or ValueError for the caller to turn into a sentence.
    """
    with torch.device("meta"):
        module = build()
    return _tensor_bytes(module)


def check_tensor_bytes(build: Callable[[], nn.Module], what: str,
                       error: type[ColonnadeError], fix: str) -> None:
    """Refuse, in one sentence naming ``what``, a network past ``tensor_budget()``."""
    budget = tensor_budget()
    try:
        needed = measured_bytes(build)
    except (OverflowError, RuntimeError, ValueError):
        needed = None
    if needed is None or needed > budget:
        size = "more than any machine holds" if needed is None else readable_bytes(needed)
        raise error(f"{what} needs {size} for its weights, more than half of this machine's "
                    f"memory ({readable_bytes(budget)}), so it is refused before anything "
                    f"is allocated; {fix}")


def check_activation(elements: int, where: str, error: type[ColonnadeError],
                     fix: str) -> None:
    """Refuse one sample's activation of ``elements`` float32 values past the budget."""
    budget = tensor_budget()
    if elements * 4 > budget:
        raise error(f"{where}: one sample's output has {elements:,} values "
                    f"({readable_bytes(elements * 4)}), more than half of this machine's "
                    f"memory ({readable_bytes(budget)}); {fix}")

