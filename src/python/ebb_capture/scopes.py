"""Groups from the module path: a stack of the modules whose forward is
running, kept by global module hooks while a recording is open."""

from __future__ import annotations

from typing import Callable

import torch
from torch import nn
from torch.utils.hooks import RemovableHandle


def group_path(dotted: str) -> str:
    """``encoder.layers.2.self_attn`` → ``encoder/layers.2/self_attn``: a
    numbered child of a container stays joined to it by a dot."""
    parts: list[str] = []
    for part in dotted.split("."):
        if part.isdigit() and parts:
            parts[-1] = f"{parts[-1]}.{part}"
        else:
            parts.append(part)
    return "/".join(parts)


class ModuleStack:
    """Which named module is running, innermost last.

    Modules of the recorded model are named by ``named_modules()``; any other
    module (a loss module, one built on the fly) by its class name under the
    module that called it.
    """

    def __init__(self, model: nn.Module | None, on_exit: Callable[[nn.Module, object], None] | None = None) -> None:
        self._names: dict[int, str] = {}
        if model is not None:
            for name, module in model.named_modules():
                self._names[id(module)] = group_path(name)
        self._stack: list[tuple[nn.Module, str]] = []
        self._on_exit = on_exit
        self._handles: list[RemovableHandle] = []

    def open(self) -> None:
        self._handles = [
            nn.modules.module.register_module_forward_pre_hook(self._enter),
            nn.modules.module.register_module_forward_hook(self._leave, always_call=True),
        ]

    def close(self) -> None:
        for handle in self._handles:
            handle.remove()
        self._handles = []
        self._stack = []

    def _enter(self, module: nn.Module, args: object) -> None:
        name = self._names.get(id(module))
        if name is None:
            # A module outside the model (a loss module, one built on the
            # fly) is named by its class, under the module that called it.
            parent = self._stack[-1][1] if self._stack else ""
            own = type(module).__name__
            name = f"{parent}/{own}" if parent else own
        self._stack.append((module, name))

    def _leave(self, module: nn.Module, args: object, output: object) -> None:
        # Pop down to this module (a module that raised may have left others).
        while self._stack:
            top, _ = self._stack.pop()
            if top is module:
                break
        if self._on_exit is not None:
            self._on_exit(module, output)

    @property
    def group(self) -> str:
        """The running module's group path, or "" outside every module."""
        return self._stack[-1][1] if self._stack else ""

    def inside(self, module: nn.Module) -> bool:
        """True while `module`'s forward is running (at any depth)."""
        return any(m is module for m, _ in self._stack)


def parameter_names(model: nn.Module | None) -> dict[int, tuple[str, torch.Tensor]]:
    """id → (name, tensor) for every parameter of `model`."""
    if model is None:
        return {}
    return {id(p): (name, p) for name, p in model.named_parameters()}


def buffer_names(model: nn.Module | None) -> dict[int, tuple[str, torch.Tensor]]:
    """id → (name, tensor) for every buffer of `model` (running statistics)."""
    if model is None:
        return {}
    return {id(b): (name, b) for name, b in model.named_buffers()}
