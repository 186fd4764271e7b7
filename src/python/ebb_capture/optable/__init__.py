"""The table from ATen ops to Ebb's op catalog.

Each handler receives the recorder and one `Call` (the op, its arguments by
schema name, its real outputs) and emits one or more Ebb nodes, returning
the node of each tensor output (None for outputs with no derivative, such
as indices). A handler that cannot map a particular call raises `Unmapped`;
the recorder then decomposes the op with PyTorch's decomposition tables, and
failing that records it as a custom op with its Jacobian.
"""

from __future__ import annotations

from typing import TYPE_CHECKING, Any, Callable, Sequence

import torch
from torch._ops import OpOverload
from torch.utils._pytree import tree_flatten

if TYPE_CHECKING:
    from ..recorder import Recorder


class Unmapped(Exception):
    """This call has no direct mapping (say why); decompose it instead."""


class Call:
    """One dispatched op: arguments by schema name (defaults filled in) and
    the real outputs, flattened."""

    def __init__(self, func: OpOverload, args: Sequence[Any], kwargs: dict[str, Any], out: Any) -> None:
        self.func = func
        self.args = tuple(args)
        self.kwargs = dict(kwargs)
        self.out = out
        self.outs: list[torch.Tensor] = [o for o in tree_flatten(out)[0] if isinstance(o, torch.Tensor)]
        self.a: dict[str, Any] = {}
        for i, arg in enumerate(func._schema.arguments):
            if i < len(args) and not arg.kwarg_only:
                self.a[arg.name] = args[i]
            elif arg.name in kwargs:
                self.a[arg.name] = kwargs[arg.name]
            elif arg.has_default_value():
                self.a[arg.name] = arg.default_value
            else:
                self.a[arg.name] = None

    @property
    def name(self) -> str:
        return self.func._schema.name.split("::")[-1]

    def __getitem__(self, name: str) -> Any:
        return self.a[name]


class Later:
    """An output whose nodes are made only if a later op reads it (the
    statistics a normalisation returns for its own backward)."""

    def __init__(self, make: Callable[[], str]) -> None:
        self.make = make


Handler = Callable[["Recorder", Call], list["str | Later | None"]]

HANDLERS: dict[OpOverload, Handler] = {}


def handles(*ops: OpOverload) -> Callable[[Handler], Handler]:
    """Registers a handler for the given op overloads."""

    def register(handler: Handler) -> Handler:
        for op in ops:
            HANDLERS[op] = handler
        return handler

    return register


def _inplace_views() -> dict[OpOverload, OpOverload]:
    aten = torch.ops.aten
    return {
        aten.t_.default: aten.t.default,
        aten.transpose_.default: aten.transpose.int,
        aten.unsqueeze_.default: aten.unsqueeze.default,
        aten.squeeze_.default: aten.squeeze.default,
        aten.squeeze_.dim: aten.squeeze.dim,
        aten.squeeze_.dims: aten.squeeze.dims,
        aten.as_strided_.default: aten.as_strided.default,
    }


_INPLACE_VIEWS = _inplace_views()


def functional_of(func: OpOverload) -> OpOverload | None:
    """The out-of-place overload of an in-place (``add_``, ``transpose_``)
    or ``out=`` op."""
    if func in _INPLACE_VIEWS:
        return _INPLACE_VIEWS[func]
    packet_name = func._schema.name.split("::")[-1]
    overload = func._overloadname
    aten = torch.ops.aten
    if packet_name.endswith("_") and not packet_name.startswith("_"):
        packet = getattr(aten, packet_name[:-1], None)
        if packet is not None and overload in packet.overloads():
            return getattr(packet, overload)
        return None
    if overload == "out" or overload.endswith("_out"):
        packet = getattr(aten, packet_name, None)
        base = "default" if overload == "out" else overload[: -len("_out")]
        if packet is not None and base in packet.overloads():
            return getattr(packet, base)
    return None


def lookup(func: OpOverload) -> Handler | None:
    """The handler of `func` (or of its out-of-place form)."""
    handler = HANDLERS.get(func)
    if handler is None:
        functional = functional_of(func)
        if functional is not None:
            handler = HANDLERS.get(functional)
    return handler


# Register every handler.
from . import axes, elementwise, linalg, losses, nn, reduce, shape, views  # noqa: E402,F401
