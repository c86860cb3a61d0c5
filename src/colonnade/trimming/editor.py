"""Pruning adapters in memory, with an exact undo, so a failed trim leaves nothing behind."""

from __future__ import annotations

import copy

import torch

from ..model.network import ProgressiveNet

__all__ = ["AdapterEditor"]


class AdapterEditor:
    """Prunes adapters in memory and can put everything back exactly (on failure)."""

    def __init__(self, net: ProgressiveNet, task: str, parts: list[str]) -> None:
        self.net = net
        self.order = list(net.adapters.keys())
        self.modules = dict(net.adapters.items())
        self.info = copy.deepcopy(net.adapter_info)
        self.meta = copy.deepcopy(net.meta)
        owned = dict(net.part_modules())
        self.state = {part: {k: v.detach().clone() for k, v in owned[part].state_dict().items()}
                      for part in dict.fromkeys(parts)}
        self.biases: dict[str, tuple[torch.nn.Module, torch.Tensor]] = {}

    def prune(self, key: str, fold: tuple[torch.nn.Module, torch.Tensor] | None = None,
              ) -> torch.nn.Module:
        """Remove an adapter; with ``fold`` = (layer, mean), add its mean to the bias."""
        module = self.net.adapters[key]
        if fold is not None:
            layer, mean = fold
            self.biases[key] = (layer, layer.bias.detach().clone())
            with torch.no_grad():
                layer.bias.add_(mean.to(layer.bias.dtype).to(layer.bias.device))
        self.net.retire_adapters([key], "pruned", "prune")
        return module

    def unprune(self, key: str, module: torch.nn.Module) -> None:
        if key in self.biases:
            layer, bias = self.biases.pop(key)
            with torch.no_grad():
                layer.bias.copy_(bias)
        self.net.reinstate_adapters({key: module}, self.order)

    def restore(self) -> None:
        net = self.net
        net.set_adapter_modules(self.modules, self.order)
        net.adapter_info.clear()
        net.adapter_info.update(self.info)
        net.meta.clear()
        net.meta.update(self.meta)
        parts = dict(net.part_modules())
        with torch.no_grad():
            for part, state in self.state.items():
                parts[part].load_state_dict(state)
        net._reindex()
        net.freeze()
