"""Where in the user's own code an op ran: the first stack frame outside
PyTorch and this package, and the custom autograd Function it runs inside."""

from __future__ import annotations

import os
import sys
from types import FrameType

import torch

_TORCH_DIR = os.path.dirname(torch.__file__) + os.sep
_PACKAGE_DIR = os.path.dirname(__file__) + os.sep


def _is_library(filename: str) -> bool:
    return (
        filename.startswith(_TORCH_DIR)
        or filename.startswith(_PACKAGE_DIR)
        or filename.startswith("<frozen")
    )


def user_frame() -> FrameType | None:
    """The innermost frame of the user's own code (outside torch and us)."""
    frame = sys._getframe(1)
    while frame is not None and _is_library(frame.f_code.co_filename):
        frame = frame.f_back
    return frame


def site_of(frame: FrameType | None) -> str | None:
    """`file:line` of a frame, the file by its base name (stable across
    machines and checkouts)."""
    if frame is None:
        return None
    return f"{os.path.basename(frame.f_code.co_filename)}:{frame.f_lineno}"


def custom_function() -> str | None:
    """The name of the custom ``torch.autograd.Function`` whose forward is
    running, if any: a ``forward`` frame whose first argument is the
    Function's context (or, for Functions without one, whose class is a
    Function)."""
    frame = sys._getframe(1)
    while frame is not None:
        code = frame.f_code
        if code.co_name == "forward" and not _is_library(code.co_filename):
            if code.co_argcount >= 1:
                first = frame.f_locals.get(code.co_varnames[0])
                owner = getattr(type(first), "_forward_cls", None)
                if isinstance(owner, type):
                    return owner.__name__
            qualname = getattr(code, "co_qualname", "")
            parts = qualname.split(".")
            if len(parts) >= 2:
                owner = frame.f_globals.get(parts[-2])
                if isinstance(owner, type) and issubclass(owner, torch.autograd.Function):
                    return owner.__name__
        frame = frame.f_back
    return None


def local_name(frame: FrameType | None, tensor: torch.Tensor) -> str | None:
    """The name the user's code gives `tensor` in `frame`, if a local holds it."""
    if frame is None:
        return None
    for scope in (frame.f_locals, frame.f_globals):
        for name, value in scope.items():
            if value is tensor and name.isidentifier() and not name.startswith("_"):
                return name
    return None
