"""A layer is one call of a module: a module run k times in one forward pass gives k layers.

Call 0 keeps the module's name; call k (k >= 1) is ``name_k``, as torchvision's graph feature
extractor names repeated calls (ResNet's shared ReLU: ``layer1.0.relu`` after bn1,
``layer1.0.relu_1`` at the block output). Where another module is named like that (``act_1``
beside ``act``), every repeated call of ``act`` is ``act_call1``, ``act_call2``, ... Every part of unitlens that observes layers (layer table, receptive fields,
truncated forward) names calls here, so they agree on which call a name means.
"""
from __future__ import annotations

import re


class Calls:
    """Names the calls of the modules of one network (`modules`: all its module names)."""

    def __init__(self, modules):
        self.modules = set(modules)
        # names like 'act_1' belong to modules: then every repeated call of 'act' is 'act_call<k>'
        self._taken = {m.group(1) for n in self.modules if (m := re.fullmatch(r"(.*)_[0-9]+", n))}
        self._count: dict[str, int] = {}

    def name(self, module: str, k: int) -> str:
        """Layer name of call k (0-based) of `module`."""
        if k == 0:
            return module
        return f"{module}_call{k}" if module in self._taken else f"{module}_{k}"

    def split(self, layer: str) -> tuple[str, int] | None:
        """Inverse of name: (module, call index), or None when no call has this name."""
        if layer in self.modules:
            return layer, 0
        m = re.fullmatch(r"(.*?)_(?:call)?([1-9][0-9]*)", layer)
        if m and m.group(1) in self.modules and self.name(m.group(1), int(m.group(2))) == layer:
            return m.group(1), int(m.group(2))
        return None

    def next(self, module: str) -> str:
        """Name of the next call of `module`: feed every call of a hooked module, in order."""
        k = self._count.get(module, 0)
        self._count[module] = k + 1
        return self.name(module, k)
