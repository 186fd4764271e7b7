"""The recorder: turns the ops PyTorch dispatches during one step into Ebb
nodes, following views, in-place writes and constants, and keeps the
gradients PyTorch reports.

Every tensor the step touches is either *bound* to the node holding its
current value, a *constant* (made from constants only, drawn at random, or
detached), or not seen yet. A tensor seen for the first time becomes a leaf:
a parameter (by the model's own name), a buffer (a named constant), a
constant, or an input. An op with at least one live (non-constant) floating
input is recorded, when grad mode is on or a custom autograd Function's
forward runs; any other op is folded into the constants it produces.
"""

from __future__ import annotations

import weakref
from dataclasses import dataclass
from functools import partial
from types import FrameType
from typing import Any, Callable, Iterable

import torch
from torch import nn
from torch._decomp import decomposition_table
from torch._ops import OpOverload
from torch.utils._python_dispatch import TorchDispatchMode
from torch.utils._pytree import tree_flatten, tree_map, tree_unflatten

from . import sites
from .aliasing import AliasTracker, Geometry, Write, overlaps
from .dtypes import EBB_NAME, ebb_dtype, is_float, opmath
from .errors import CaptureError
from .graph import Graph, Node
from .optable import Call, Later, Unmapped, catalog, functional_of, lookup
from .scopes import ModuleStack, buffer_names, parameter_names
from .spill import Spill, Stored

aten = torch.ops.aten

# Ops whose outputs carry no derivative: copies that stop the gradient,
# tensors shaped like another but not computed from its values, and
# piecewise-constant functions.
_NONDIFF_PACKETS = {
    aten.detach,
    aten.lift_fresh,
    aten.lift_fresh_copy,
    aten.lift,
    aten.zeros_like,
    aten.ones_like,
    aten.empty_like,
    aten.full_like,
    aten.rand_like,
    aten.randn_like,
    aten.randint_like,
    aten.new_zeros,
    aten.new_ones,
    aten.new_empty,
    aten.new_full,
    aten.new_empty_strided,
    aten.sign,
    aten.floor,
    aten.ceil,
    aten.round,
    aten.trunc,
    aten.fill,
    aten.fill_,
    aten.zero_,
    aten.zero,
    aten.bernoulli,
    aten.bernoulli_,
    aten.uniform_,
    aten.normal_,
    aten.exponential_,
    aten.random_,
    aten._local_scalar_dense,
}
# Ops that only draw random numbers (their outputs are constants as drawn).
_RANDOM_GENERATORS = {
    aten.bernoulli,
    aten.bernoulli_,
    aten.rand,
    aten.rand_like,
    aten.randn,
    aten.randn_like,
    aten.randint,
    aten.randint_like,
    aten.randperm,
    aten.normal,
    aten.normal_,
    aten.uniform,
    aten.uniform_,
    aten.exponential_,
    aten.random_,
    aten.multinomial,
    aten.poisson,
    aten.cauchy_,
    aten.geometric_,
    aten.log_normal_,
}
_NONDIFF_OVERLOADS = {aten.div.Tensor_mode, aten.div.Scalar_mode, aten.div_.Tensor_mode, aten.div_.Scalar_mode}

_TORCH_DTYPE = {"f64": torch.float64, "f32": torch.float32, "f16": torch.float16, "bf16": torch.bfloat16}
_HALF = (torch.float16, torch.bfloat16)
# Pointwise ops whose partials are exact in f16 and bf16 (1, −1, 0 or an
# operand), so that one rounding of the contribution is all there is.
_EXACT_IN_HALF = {"add", "sub", "rsub", "neg", "mul", "relu", "abs", "where", "maximum", "minimum", "clamp", "clamp_min", "clamp_max", "hardtanh", "threshold", "masked_fill", "copy", "_to_copy", "to", "clone"}

# Default for the largest custom-op Jacobian, in entries, over all its edges.
JACOBIAN_LIMIT = 1 << 18


@dataclass
class Binding:
    """A tensor (weakly held) and the node holding its current value, as of
    write number `seq`."""

    ref: weakref.ref
    node: str
    const: bool
    seq: int


@dataclass
class Deferred:
    """A custom op whose partials are computed once the step is over (autograd
    does not run inside the dispatcher)."""

    func: OpOverload
    args: tuple[Any, ...]
    kwargs: dict[str, Any]
    live: list[tuple[int, str]]  # flat argument index → input node
    outputs: list[tuple[int, Node]]  # flat output index → its custom node
    pointwise: bool
    site: str | None


def written_tensors(func: OpOverload, args: tuple[Any, ...], kwargs: dict[str, Any]) -> list[torch.Tensor]:
    """The tensors `func` writes into, from its schema's alias annotations."""
    written: list[torch.Tensor] = []
    for i, arg in enumerate(func._schema.arguments):
        info = arg.alias_info
        if info is None or not info.is_write:
            continue
        value = args[i] if i < len(args) and not arg.kwarg_only else kwargs.get(arg.name)
        for t in tree_flatten(value)[0]:
            if isinstance(t, torch.Tensor):
                written.append(t)
    return written


class _Abort(Exception):
    """A decomposition reached an op below ATen (a prim): give it up."""


class _Mode(TorchDispatchMode):
    def __init__(self, recorder: "Recorder") -> None:
        super().__init__()
        self.recorder = recorder

    def __torch_dispatch__(self, func, types, args=(), kwargs=None):  # type: ignore[no-untyped-def]
        return self.recorder.dispatch(func, tuple(args), dict(kwargs or {}))


class Recorder:
    """State of one recording; `Recording` is its public face."""

    def __init__(
        self,
        model: nn.Module | None,
        module: nn.Module | None,
        gradients: str,
        jacobian_limit: int,
        spill: Spill,
    ) -> None:
        if gradients not in ("all", "params", "none"):
            raise ValueError("gradients must be 'all', 'params' or 'none'")
        self.model = model
        self.module = module
        self.gradients = gradients
        self.jacobian_limit = jacobian_limit
        self.graph = Graph()
        self.spill = spill
        self._unsealed: list[Node] = []
        self.alias = AliasTracker()
        # Both keyed by id(tensor); an entry goes when its tensor dies, so a
        # new tensor at a reused address is never mistaken for an old one.
        self.bindings: dict[int, Binding] = {}
        self.consts: dict[int, tuple[weakref.ref, int]] = {}
        self._later: dict[int, tuple[weakref.ref, Later]] = {}
        names_from = model if model is not None else module
        self.params = parameter_names(names_from)
        self.buffers = buffer_names(names_from)
        self.stack = ModuleStack(names_from, on_exit=self._module_done)
        self.mode = _Mode(self)
        self.active = False
        self.reported: dict[str, Stored | float] = {}
        self._hooked: set[str] = set()
        self._pending: list[tuple[torch.Tensor, str]] = []
        # Outputs of ops on tensors that require grad, to be checked once
        # autograd has wrapped them (see `_settle_differentiability`).
        self._unsettled: list[tuple[weakref.ref, str | None]] = []
        self._handles: list[Any] = []
        self.deferred: list[Deferred] = []
        self._decomposing: set[OpOverload] = set()
        self.output_node: str | None = None
        self.scope_outputs: list[tuple[torch.Tensor, str]] = []
        # Per dispatched op: the user's frame, site and group (computed on demand).
        self._frame: FrameType | None = None
        self._site: str | None = None
        self._group: str | None = None
        self._function: str | None = None
        self._op_name = ""

    # ----------------------------------------------------------------- life

    def open(self) -> None:
        self.stack.open()
        self.active = True
        self.mode.__enter__()

    def close(self) -> None:
        """Stops intercepting; safe to call once, whatever happened."""
        self.active = False
        try:
            self.mode.__exit__(None, None, None)
        finally:
            self.stack.close()
            for handle in self._handles:
                handle.remove()
            self._handles = []

    # ------------------------------------------------------------- dispatch

    def dispatch(self, func: OpOverload, args: tuple[Any, ...], kwargs: dict[str, Any]) -> Any:
        self.flush_hooks()
        written = written_tensors(func, args, kwargs)
        # Writes are followed from the start of the block until the output is
        # named, outside backward; ops are recorded only inside the scope.
        tracking = self.active and torch._C._current_autograd_node() is None
        if not tracking or (self.module is not None and not self.stack.inside(self.module)):
            out = func(*args, **kwargs)
            if tracking and written:
                self._note_unrecorded_writes(written)
            return out
        if self._decomposing and func.namespace == "prims":
            raise _Abort(str(func))
        self._frame = None
        self._site = None
        self._group = None
        self._op_name = str(func)
        if not self._differentiable(func, args, kwargs):
            return self._fold(func, args, kwargs, written)
        out = self._record(func, args, kwargs, written)
        if not self._decomposing:
            self.seal()
            self._frame = None  # a frame keeps its locals alive
        return out

    def _differentiable(self, func: OpOverload, args: tuple[Any, ...], kwargs: dict[str, Any]) -> bool:
        """Whether the op is recorded (rather than folded into constants)."""
        if func.overloadpacket in _NONDIFF_PACKETS or func in _NONDIFF_OVERLOADS:
            return False
        if torch.Tag.nondeterministic_seeded in func.tags and lookup(func) is None and not self._deterministic_here(func, args, kwargs):
            if func.overloadpacket in _RANDOM_GENERATORS:
                return False  # fresh random numbers: constants, as drawn
            if any(self.is_live(t) for t in tree_flatten((args, kwargs))[0] if isinstance(t, torch.Tensor)):
                raise self.error(
                    f"{func} draws random numbers inside an op with a derivative, which cannot be recorded as it ran",
                    "record the step in eval() mode or with that op's random part off, or draw the randomness separately (a mask multiplied in)",
                )
            return False
        self._function = None
        if not torch.is_grad_enabled():
            # Grad mode is off inside a custom Function's forward (recorded as
            # the ops it runs) and in no_grad blocks (constants).
            self._function = sites.custom_function()
            if self._function is None:
                return False
        return any(self.is_live(t) for t in tree_flatten((args, kwargs))[0] if isinstance(t, torch.Tensor))

    @staticmethod
    def _deterministic_here(func: OpOverload, args: tuple[Any, ...], kwargs: dict[str, Any]) -> bool:
        """A random op whose probability argument is 0 draws nothing."""
        for i, arg in enumerate(func._schema.arguments):
            if arg.name in ("dropout_p", "p"):
                value = args[i] if i < len(args) and not arg.kwarg_only else kwargs.get(arg.name, arg.default_value)
                return isinstance(value, (int, float)) and value == 0
        return False

    def _fold(self, func: OpOverload, args: tuple[Any, ...], kwargs: dict[str, Any], written: list[torch.Tensor]) -> Any:
        out = func(*args, **kwargs)
        written_ids = {id(t) for t in written}
        for o in tree_flatten(out)[0]:
            if isinstance(o, torch.Tensor) and id(o) not in written_ids:
                b = self.bindings.get(id(o))
                if b is None or b.const:
                    self._make_const(o)
        self._note_unrecorded_writes(written)
        return out

    def _note_unrecorded_writes(self, written: list[torch.Tensor]) -> None:
        for t in written:
            self.alias.log_write(t, None)
            self._make_const(t)

    def _make_const(self, t: torch.Tensor) -> None:
        """`t` now holds a value with no derivative, as of now."""
        key = id(t)
        self.bindings.pop(key, None)
        ref = weakref.ref(t, lambda r, key=key: self._forget(self.consts, key, r))
        self.consts[key] = (ref, self.alias.seq)

    @staticmethod
    def _forget(table: dict[int, Any], key: int, ref: weakref.ref) -> None:
        entry = table.get(key)
        if entry is not None and (entry.ref if isinstance(entry, Binding) else entry[0]) is ref:
            del table[key]

    def _record(self, func: OpOverload, args: tuple[Any, ...], kwargs: dict[str, Any], written: list[torch.Tensor]) -> Any:
        # Values as they were before an in-place write, bound to their nodes,
        # stand in for the written tensors when the op is mapped. An in-place
        # view (transpose_) changes only the tensor's shape and strides: the
        # tensor as it was is a view of the same memory.
        reshapes_only = torch.Tag.inplace_view in func.tags
        before: dict[int, torch.Tensor] = {}
        for t in written:
            if id(t) in before:
                continue
            old = t.as_strided(t.shape, t.stride(), t.storage_offset()) if reshapes_only else t.clone()
            if self.is_live(t):
                self.bind(old, self.node(t))
            else:
                self._make_const(old)
            before[id(t)] = old
        if reshapes_only:
            written = []  # no element changes: nothing to log
        out = func(*args, **kwargs)
        outs = [o for o in tree_flatten(out)[0] if isinstance(o, torch.Tensor)]
        if not any(is_float(o) for o in outs):
            for o in outs:
                self._make_const(o)
            self._note_unrecorded_writes([t for t in written if not any(t is o for o in outs)])
            return out
        if before:
            swap = lambda x: before.get(id(x), x) if isinstance(x, torch.Tensor) else x  # noqa: E731
            call_args, call_kwargs = tree_map(swap, args), tree_map(swap, kwargs)
        else:
            call_args, call_kwargs = args, kwargs
        call = Call(func, call_args, call_kwargs, out)
        nodes = self._map_in_opmath(call) if self._computes_in_opmath(call) else self.map_call(call)
        self._bind_outputs(call, nodes, written)
        if not self._decomposing and self._function is None and torch.is_grad_enabled():
            if any(isinstance(t, torch.Tensor) and t.requires_grad for t in tree_flatten((args, kwargs))[0]):
                for tensor, node in zip(call.outs, nodes):
                    if isinstance(node, str):
                        self._unsettled.append((weakref.ref(tensor), node))
                    elif isinstance(node, Later):
                        self._unsettled.append((weakref.ref(tensor), None))
        return out

    def _computes_in_opmath(self, call: Call) -> bool:
        """A pointwise op on f16/bf16 tensors whose partials are not exact in
        that format: PyTorch's kernels compute it in f32 and round once, so it
        is recorded that way (cast, the op in f32, cast back)."""
        if torch.Tag.pointwise not in call.func.tags:
            return False
        if not call.outs or not all(o.dtype in _HALF for o in call.outs):
            return False
        name = self.functional(call.func)._schema.name.split("::")[-1]
        return name not in _EXACT_IN_HALF

    def _map_in_opmath(self, call: Call) -> list[str | Later | None]:
        func = self.functional(call.func)
        casts: dict[int, torch.Tensor] = {}

        def widen(x: Any) -> Any:
            if not isinstance(x, torch.Tensor) or x.dtype not in _HALF:
                return x
            if id(x) not in casts:
                wide = x.to(torch.float32)
                if self.is_live(x):
                    self.bind(wide, self.op("cast", [x], wide))
                else:
                    self._make_const(wide)
                casts[id(x)] = wide
            return casts[id(x)]

        args, kwargs = tree_map(widen, call.args), tree_map(widen, call.kwargs)
        out = self.compute(lambda: func(*args, **kwargs))
        wide_call = Call(func, args, kwargs, out)
        nodes = self.map_call(wide_call)
        narrowed: list[str | Later | None] = []
        for wide, real, node in zip(wide_call.outs, call.outs, nodes):
            narrowed.append(self.op("cast", [node], real) if isinstance(node, str) else None)
        return narrowed

    def _bind_outputs(self, call: Call, nodes: list[str | Later | None], written: list[torch.Tensor]) -> None:
        if len(nodes) != len(call.outs):
            raise AssertionError(f"{call.func}: {len(nodes)} nodes for {len(call.outs)} outputs")
        written_ids = {id(t) for t in written}
        done: set[int] = set()
        for tensor, node in zip(call.outs, nodes):
            if isinstance(node, Later):
                self.bindings.pop(id(tensor), None)
                key = id(tensor)
                ref = weakref.ref(tensor, lambda r, key=key: self._later.pop(key, None))
                self._later[key] = (ref, node)
                done.add(key)
                continue
            if node is None or not is_float(tensor):
                self._make_const(tensor)
                if id(tensor) in written_ids:
                    self.alias.log_write(tensor, None)
                done.add(id(tensor))
                continue
            if id(tensor) in written_ids:
                self.alias.log_write(tensor, node)
            self.bind(tensor, node)
            done.add(id(tensor))
            recorded = self.graph.by_id[node]
            # Tensors made inside a decomposition never get a backward node.
            if self.gradients == "all" and not self._decomposing and recorded.op not in ("param", "input", "const") and node not in self._hooked:
                self._pending.append((tensor, node))
        # Written tensors that are not outputs (running statistics) now hold
        # values the step does not differentiate.
        for t in written:
            if id(t) not in done:
                self._note_unrecorded_writes([t])

    # ------------------------------------------------------------ mapping

    def map_call(self, call: Call) -> list[str | Later | None]:
        """Handler, else decomposition, else a custom op with its Jacobian."""
        handler = lookup(call.func)
        if handler is not None:
            mark = self._mark()
            try:
                return handler(self, call)
            except Unmapped:
                self._rollback(mark)
        functional = self.functional(call.func)
        if functional is call.func and written_tensors(call.func, call.args, call.kwargs):
            raise self.error(f"{call.func} writes in place and has no out-of-place form to record", "compute it out of place")
        nodes = self._decompose(functional, call)
        if nodes is not None:
            return nodes
        return self._custom(functional, call)

    def _mark(self) -> int:
        return len(self.graph.nodes)

    def _rollback(self, mark: int) -> None:
        for node in self.graph.nodes[mark:]:
            del self.graph.by_id[node.id]
        del self.graph.nodes[mark:]
        self._unsealed = [n for n in self._unsealed if n.id in self.graph.by_id]
        for key in [k for k, b in self.bindings.items() if b.node not in self.graph.by_id]:
            del self.bindings[key]
        self._pending = [(t, n) for t, n in self._pending if n in self.graph.by_id]

    def _decompose(self, func: OpOverload, call: Call) -> list[str | None] | None:
        decomposition = decomposition_table.get(func)
        if decomposition is None or func in self._decomposing:
            return None
        if torch.Tag.nondeterministic_seeded in func.tags:
            return None  # a decomposition would draw other random numbers
        mark = self._mark()
        self._decomposing.add(func)
        # The decomposition's own in-place writes (running statistics) go
        # into copies, never into the user's tensors.
        copies: dict[int, torch.Tensor] = {}
        for t in written_tensors(func, call.args, call.kwargs):
            copy = t.clone()
            if self.is_live(t):
                self.bind(copy, self.node(t))
            else:
                self._make_const(copy)
            copies[id(t)] = copy
        swap = lambda x: copies.get(id(x), x) if isinstance(x, torch.Tensor) else x  # noqa: E731
        args, kwargs = tree_map(swap, call.args), tree_map(swap, call.kwargs)
        try:
            with self.mode:
                result = decomposition(*args, **kwargs)
        except (CaptureError, KeyboardInterrupt):
            raise
        except Exception:
            self._rollback(mark)
            return None
        finally:
            self._decomposing.discard(func)
        parts = [o for o in tree_flatten(result)[0] if isinstance(o, torch.Tensor)]
        if len(parts) != len(call.outs):
            self._rollback(mark)
            return None
        nodes: list[str | None] = []
        for real, part in zip(call.outs, parts):
            if not is_float(real) or not is_float(part) or not self.is_live(part):
                nodes.append(None)
                continue
            node_id = self.node(part)
            node = self.graph.by_id[node_id]
            # The decomposition's last node carries the value the real kernel
            # computed, so consumers read exactly what the step read.
            if node.index >= mark and node.shape == tuple(real.shape) and part.dtype == real.dtype:
                node.value = real
            elif part.dtype != real.dtype or tuple(part.shape) != tuple(real.shape):
                self._rollback(mark)
                return None
            nodes.append(node_id)
        return nodes

    def _custom(self, func: OpOverload, call: Call) -> list[str | None]:
        """Records the op as a custom op; its Jacobian is computed later."""
        flat, _ = tree_flatten((call.args, call.kwargs))
        live = [(i, t) for i, t in enumerate(flat) if isinstance(t, torch.Tensor) and is_float(t) and self.is_live(t)]
        floats = [(k, o) for k, o in enumerate(call.outs) if is_float(o)]
        pointwise = torch.Tag.pointwise in func.tags and len(floats) == 1
        if pointwise:
            entries = sum(o.numel() for _, o in floats) * len(live)
        else:
            entries = sum(o.numel() * t.numel() for _, o in floats for _, t in live)
        if entries > self.jacobian_limit:
            raise self.error(
                f"{func} has no Ebb op and no decomposition, and its Jacobian would have {entries} entries (limit {self.jacobian_limit})",
                "record a smaller block with record(..., module=...), raise jacobian_limit, or express it with other ops",
            )
        inputs = [self.node(t) for _, t in live]
        name = f"custom.{func._schema.name.split('::')[-1]}"
        nodes: list[str | None] = [None] * len(call.outs)
        outputs: list[tuple[int, Node]] = []
        for k, o in floats:
            node_id = self.op(name, inputs, o)
            nodes[k] = node_id
            outputs.append((k, self.graph.by_id[node_id]))
        frozen = [t.detach().clone() if isinstance(t, torch.Tensor) else t for t in flat]
        args, kwargs = tree_unflatten(frozen, tree_flatten((call.args, call.kwargs))[1])
        self.deferred.append(
            Deferred(func, args, kwargs, [(i, n) for (i, _), n in zip(live, inputs)], outputs, pointwise, self.site)
        )
        return nodes

    # ------------------------------------------------------------ emitting

    @property
    def frame(self) -> FrameType | None:
        if self._frame is None:
            self._frame = sites.user_frame()
        return self._frame

    @property
    def site(self) -> str | None:
        if self._site is None:
            self._site = sites.site_of(self.frame)
        return self._site

    @property
    def group(self) -> str:
        if self._group is None:
            group = self.stack.group
            if self._function is not None:
                group = f"{group}/{self._function}" if group else self._function
            self._group = group
        return self._group

    def error(self, what: str, todo: str) -> CaptureError:
        where = f" at {self.site}" if self.site else ""
        return CaptureError(f"ebb_capture: {what}{where}; {todo}")

    def functional(self, func: OpOverload) -> OpOverload:
        return functional_of(func) or func

    def compute(self, fn: Callable[[], torch.Tensor]) -> torch.Tensor:
        """An intermediate value of a split op, computed as PyTorch would."""
        with torch.no_grad():
            return fn()

    def seal(self) -> None:
        """Stores the values of the nodes recorded since the last call: each
        tensor goes to the spill file now, so nothing written in place later
        can change it, and nothing stays in memory."""
        unsealed, self._unsealed = self._unsealed, []
        for node in unsealed:
            value = node.value
            if isinstance(value, torch.Tensor):
                node.value = float(value.item()) if value.dim() == 0 else self.spill.put(node.id, value)

    def _new(self, op: str, inputs: list[str], value: torch.Tensor | float, dtype: str, base: str | None = None, **attrs: Any) -> str:
        if not catalog.known(op):
            raise AssertionError(f"{op!r} is not in Ebb's catalog")
        group = self.group
        if base is None:
            base = f"{group}/{op}" if group else op
        node = Node(
            id=self.graph.fresh_id(base),
            op=op,
            inputs=inputs,
            value=value,
            dtype=dtype,
            group=group,
            site=self.site,
            attrs=attrs,
        )
        self.graph.add(node)
        self._unsealed.append(node)
        return node.id

    def op(self, op: str, inputs: Iterable[torch.Tensor | str | float | int], value: torch.Tensor, **attrs: Any) -> str:
        """Emits a node of catalog op `op` with the given forward value."""
        ids = [self.operand(x, value) for x in inputs]
        return self._new(op, ids, value, ebb_dtype(value.dtype), **attrs)

    def operand(self, x: torch.Tensor | str | float | int | bool, like: torch.Tensor) -> str:
        """A node id for an op input: a node, a tensor or a Python number."""
        if isinstance(x, str):
            return x
        if isinstance(x, torch.Tensor):
            return self.node(x)
        return self.scalar(x, like)

    def scalar(self, x: float | int | bool, like: torch.Tensor) -> str:
        """A scalar constant in the dtype PyTorch computes it in for `like`."""
        dtype = opmath(like.dtype) if is_float(like) else torch.float64
        value = float(torch.tensor(float(x), dtype=dtype).item())
        return self._new("const", [], value, EBB_NAME[dtype])

    def const(self, value: torch.Tensor, name: str = "const") -> str:
        """A constant tensor made by a handler (a mask, a weight matrix)."""
        group = self.group
        dtype = ebb_dtype(value.dtype) if is_float(value) else "f64"
        return self._new("const", [], value, dtype, base=f"{group}/{name}" if group else name)

    def same(self, x: torch.Tensor | str, out: torch.Tensor) -> str:
        """`out` holds the same values as `x` (a copy or a trivial view)."""
        return self.operand(x, out)

    def alias_value(self, node: str, out: torch.Tensor) -> str:
        return node

    def report_as(self, node: str, other: str) -> None:
        """`node`'s gradient is `other`'s (an add's operand of the same shape)."""
        self.graph.by_id[node].reported_from = other

    def later(self, tensor: torch.Tensor, make: Callable[[], str]) -> Later:
        """`tensor`'s nodes are made by `make` if and when a later op reads it."""
        return Later(make)

    def reduce_to(self, op: str, x: torch.Tensor, axes: list[int], out: torch.Tensor, source: str | None = None, **attrs: Any) -> str:
        """Reduces `x` (held by node `source`, else its bound node) over
        `axes` with keepdims, the result `out` (its shape may drop the
        reduced axes: then it is reshaped). Several axes that are not all of
        them are moved last and merged into one first."""
        x_node: torch.Tensor | str = x if source is None else source
        rank = x.dim()
        axes = sorted(a % rank for a in axes)
        kept = [1 if d in axes else n for d, n in enumerate(x.shape)]
        if len(axes) == rank:
            value = self.compute(lambda: out.reshape(()))
            node = self.op(op, [x_node], value, **attrs)
        elif len(axes) == 1:
            value = self.compute(lambda: out.reshape(kept))
            node = self.op(op, [x_node], value, axis=axes[0], keepdims=True, **attrs)
        else:
            others = [d for d in range(rank) if d not in axes]
            moved = self.compute(lambda: x.permute(others + axes))
            node = self.op("transpose", [x_node], moved, perm=others + axes)
            merged = self.compute(lambda: moved.reshape([x.shape[d] for d in others] + [-1]))
            node = self.op("reshape", [node], merged, shape=list(merged.shape))
            value = self.compute(lambda: out.reshape([x.shape[d] for d in others] + [1]))
            node = self.op(op, [node], value, axis=len(others), keepdims=True, **attrs)
        if tuple(value.shape) != tuple(out.shape):
            node = self.op("reshape", [node], out, shape=list(out.shape))
        else:
            self.set_value(node, out)
        return node

    def shape_of(self, node: str) -> tuple[int, ...]:
        return self.graph.by_id[node].shape

    def set_value(self, node: str, value: torch.Tensor) -> None:
        """Gives a node recorded in this op the value the real kernel
        computed (same shape)."""
        recorded = self.graph.by_id[node]
        if not isinstance(recorded.value, torch.Tensor) or recorded.value.shape != value.shape:
            raise AssertionError(f"{node}: only a value recorded in this op can be replaced, by one of its shape")
        recorded.value = value

    def selection(self, x: torch.Tensor, out: torch.Tensor, where: torch.Tensor, name: str) -> str:
        """`out[i] = x.flatten()[where[i]]`: a custom op with a 0/1 Jacobian."""
        entries = out.numel() * x.numel()
        if entries > self.jacobian_limit:
            raise self.error(
                f"{self._op_name} picks {out.numel()} of {x.numel()} elements, a {entries}-entry Jacobian until Ebb's catalog has it (limit {self.jacobian_limit})",
                "record a smaller block with record(..., module=...) or raise jacobian_limit",
            )
        jacobian = torch.zeros(out.numel(), x.numel(), dtype=torch.float64)
        jacobian[torch.arange(out.numel()), where] = 1.0
        node = self.op(f"custom.{name}", [x], out)
        self.graph.by_id[node].partials = [{"jacobian": jacobian}]
        return node

    def cast(self, x: torch.Tensor | str, value: torch.Tensor) -> str:
        """A dtype conversion: a `cast` node in the target dtype."""
        return self.op("cast", [x], value)

    def broadcast(self, x: torch.Tensor | str, out: torch.Tensor) -> str:
        """`x` broadcast to `out`'s shape."""
        return self.op("broadcast_to", [x], out, shape=list(out.shape))

    # ------------------------------------------------------------ bindings

    def bind(self, t: torch.Tensor, node: str, const: bool = False, seq: int | None = None) -> None:
        key = id(t)
        self.consts.pop(key, None)
        ref = weakref.ref(t, lambda r, key=key: self._forget(self.bindings, key, r))
        self.bindings[key] = Binding(ref, node, const, self.alias.seq if seq is None else seq)

    def is_live(self, t: torch.Tensor) -> bool:
        """Whether `t` carries a derivative: floating, and bound to a
        non-constant node, a constant that live values were since written
        into, or a new leaf that will be a param or input."""
        if not is_float(t):
            return False
        b = self.bindings.get(id(t))
        if b is not None:
            return not b.const or self._written_live(t, b.seq)
        if id(t) in self._later:
            return True
        entry = self.consts.get(id(t))
        if entry is not None:
            return self._written_live(t, entry[1])
        return id(t) not in self.buffers

    def _written_live(self, t: torch.Tensor, seq: int) -> bool:
        writes = self.alias.writes_since(t, seq)
        if not writes:
            return False
        geometry = Geometry.of(t)
        return any(w.node is not None and overlaps(w.geometry, geometry) for w in writes)

    def node(self, t: torch.Tensor) -> str:
        """The node holding `t`'s current value (a new leaf if `t` is new)."""
        b = self.bindings.get(id(t))
        if b is None:
            later = self._later.pop(id(t), None)
            if later is not None:
                node = later[1].make()
                self.bind(t, node)
                return node
            return self._leaf(t)
        writes = self.alias.writes_since(t, b.seq)
        if writes:
            return self._reconcile(t, b, writes)
        return b.node

    def _leaf(self, t: torch.Tensor) -> str:
        group = self.group
        const_entry = self.consts.get(id(t))
        if id(t) in self.params:
            name, _ = self.params[id(t)]
            node = self._new("param", [], t, self._leaf_dtype(t), base=name)
            self._watch_leaf(t, node, always=True)
        elif id(t) in self.buffers:
            name, _ = self.buffers[id(t)]
            node = self._new("const", [], t, self._leaf_dtype(t), base=name)
        elif id(t) in self.consts or not is_float(t):
            base = "const" if is_float(t) else "mask" if t.dtype == torch.bool else "index"
            node = self._new("const", [], t, self._leaf_dtype(t), base=f"{group}/{base}" if group else base)
        elif t.requires_grad and t.is_leaf:
            name = sites.local_name(self.frame, t) or "param"
            node = self._new("param", [], t, self._leaf_dtype(t), base=name)
            self._watch_leaf(t, node, always=True)
        else:
            name = sites.local_name(self.frame, t) or "input"
            node = self._new("input", [], t, self._leaf_dtype(t), base=name)
            self._watch_leaf(t, node, always=False)
        is_const = self.graph.by_id[node].op == "const"
        # A constant counts from when it was made: writes of live values into
        # it since then are reassembled on top of it.
        seq = const_entry[1] if const_entry is not None else None
        self.bind(t, node, const=is_const, seq=seq)
        if seq is not None and self.alias.writes_since(t, seq):
            return self.node(t)
        return node

    def _leaf_dtype(self, t: torch.Tensor) -> str:
        return ebb_dtype(t.dtype) if is_float(t) else "f64"

    def _watch_leaf(self, t: torch.Tensor, node: str, always: bool) -> None:
        if self.gradients == "none" or (not always and self.gradients != "all"):
            return
        self._watch(t, node)

    def _reconcile(self, t: torch.Tensor, b: Binding, writes: list[Write]) -> str:
        """`t`'s node after in-place writes into its memory made elsewhere."""
        geometry = Geometry.of(t)
        node = b.node
        relevant: list[Write] = []
        for w in writes:
            if w.geometry == geometry:
                relevant = [w]  # the whole of t was written: earlier writes no longer matter
            elif overlaps(w.geometry, geometry):
                relevant.append(w)
        if not relevant:
            b.seq = self.alias.seq
            return node
        if len(relevant) == 1 and relevant[0].geometry == geometry:
            w = relevant[0]
            if w.node is None:
                self._make_const(t)
                return self._leaf(t)
            self.bind(t, w.node)
            return w.node
        node = self._reassemble(t, node, relevant, geometry)
        self.bind(t, node)
        return node

    def _reassemble(self, t: torch.Tensor, old: str, writes: list[Write], geometry: Geometry) -> str:
        """A tensor partly overwritten through other views: each element comes
        from the node last written there, or from `old`. Recorded as a custom
        op whose partials select elements (0/1 Jacobians)."""
        starts = geometry.byte_starts()
        n = starts.numel()
        source = torch.full((n,), -1, dtype=torch.int64)
        position = torch.arange(n, dtype=torch.int64)
        for k, w in enumerate(writes):
            if w.geometry.itemsize != geometry.itemsize:
                raise self.error("an in-place write reinterprets a tensor's memory as another dtype", "compute it out of place")
            w_starts = w.geometry.byte_starts()
            order = torch.argsort(w_starts)
            sorted_starts = w_starts[order]
            idx = torch.searchsorted(sorted_starts, starts).clamp(max=max(len(sorted_starts) - 1, 0))
            hit = sorted_starts[idx] == starts if len(sorted_starts) else torch.zeros(n, dtype=torch.bool)
            source[hit] = k
            position[hit] = order[idx[hit]]
        inputs: list[str] = []
        partials: list[dict[str, Any]] = []
        groups: list[tuple[str, torch.Tensor, torch.Tensor]] = []  # node, rows, columns
        old_rows = (source == -1).nonzero().flatten()
        if old_rows.numel():
            groups.append((old, old_rows, old_rows))
        for k, w in enumerate(writes):
            rows = (source == k).nonzero().flatten()
            if rows.numel() and w.node is not None:
                groups.append((w.node, rows, position[rows]))
        entries = sum(n * self.graph.by_id[g[0]].numel for g in groups)
        if entries > self.jacobian_limit:
            raise self.error(
                f"a tensor read after in-place writes into part of it through another view needs a {entries}-entry selection (limit {self.jacobian_limit})",
                "write the step out of place (torch.cat, torch.where) or raise jacobian_limit",
            )
        for node, rows, columns in groups:
            width = self.graph.by_id[node].numel
            jacobian = torch.zeros(n, width, dtype=torch.float64)
            jacobian[rows, columns] = 1.0
            inputs.append(node)
            partials.append({"jacobian": jacobian})
        value = t.detach().clone()
        node_id = self._new("custom.reassemble", inputs, value, ebb_dtype(value.dtype))
        self.graph.by_id[node_id].partials = partials
        return node_id

    # ------------------------------------------------------- gradients

    def flush_hooks(self) -> None:
        """Hooks on the outputs of earlier ops, now that autograd has
        attached their backward nodes."""
        if self._unsettled:
            self._settle_differentiability()
        if not self._pending:
            return
        pending, self._pending = self._pending, []
        for t, node in pending:
            self._watch(t, node)

    def _settle_differentiability(self) -> None:
        """Outputs that PyTorch's autograd left without a gradient although
        an input required one (layer norm's and batch norm's saved mean and
        reciprocal deviation) are constants to its backward; they become
        constants here too, so that a trace's gradients are the step's."""
        unsettled, self._unsettled = self._unsettled, []
        for ref, node in unsettled:
            t = ref()
            if t is None or t.requires_grad:
                continue
            if node is None:
                self._later.pop(id(t), None)
                self._make_const(t)
                continue
            b = self.bindings.get(id(t))
            if b is not None and b.node == node and not b.const:
                self._make_const(t)

    def _watch(self, t: torch.Tensor, node: str) -> None:
        """Keeps the gradient PyTorch computes for `t` as `node`'s."""
        if node in self._hooked or not t.requires_grad:
            return
        self._hooked.add(node)
        self._handles.append(t.register_hook(partial(self._got_grad, node)))

    def _got_grad(self, node: str, grad: torch.Tensor | None) -> None:
        """Stores the gradient PyTorch computed for `node`'s tensor."""
        recorded = self.graph.by_id.get(node)
        # An output of a multi-output op that the loss does not use (slogdet's
        # sign, unbind's other rows) gets no gradient: its hook sees None.
        if grad is None or recorded is None or tuple(grad.shape) != recorded.shape:
            return
        dtype = _TORCH_DTYPE.get(recorded.dtype)
        if dtype is not None and grad.dtype != dtype and grad.is_floating_point():
            grad = grad.to(dtype)
        self.reported[node] = float(grad.item()) if grad.dim() == 0 else self.spill.put(f"grad/{node}", grad)

    def output(self, t: torch.Tensor) -> None:
        self.flush_hooks()
        if not self.active:
            raise CaptureError("ebb_capture: rec.output() was already called, or the recording is closed; call it once, inside the block")
        if self.module is not None:
            self.active = False
            return
        b = self.bindings.get(id(t)) if isinstance(t, torch.Tensor) else None
        if b is None or b.const:
            self._site = sites.site_of(sites.user_frame())
            raise self.error(
                "the tensor given to rec.output() was not computed inside the recording from the model's parameters or inputs",
                "pass the loss computed inside the `with` block",
            )
        self.output_node = self.node(t)
        self.seal()
        self._watch(t, self.output_node)
        self.active = False

    def _module_done(self, module: nn.Module, output: object) -> None:
        if module is not self.module or not self.active:
            return
        self.flush_hooks()
        for t in tree_flatten(output)[0]:
            if isinstance(t, torch.Tensor) and is_float(t) and self.is_live(t):
                node = self.node(t)
                self.seal()
                self.scope_outputs.append((t, node))
                self._watch(t, node)
