"""PyTorch dtypes and their names in Ebb traces and safetensors files."""

from __future__ import annotations

import torch

# Ebb's four floating formats, by PyTorch dtype.
EBB_NAME: dict[torch.dtype, str] = {
    torch.float64: "f64",
    torch.float32: "f32",
    torch.float16: "f16",
    torch.bfloat16: "bf16",
}

# safetensors' dtype names (the format's own spelling) for what a trace stores.
SAFETENSORS_NAME: dict[torch.dtype, str] = {
    torch.float64: "F64",
    torch.float32: "F32",
    torch.float16: "F16",
    torch.bfloat16: "BF16",
    torch.int64: "I64",
    torch.int32: "I32",
    torch.bool: "BOOL",
}


def is_float(t: torch.Tensor) -> bool:
    """True for the floating dtypes Ebb can hold (complex is not one of them)."""
    return t.dtype in EBB_NAME


def ebb_dtype(dtype: torch.dtype) -> str:
    """The Ebb name of a floating dtype."""
    try:
        return EBB_NAME[dtype]
    except KeyError:
        raise ValueError(f"{dtype} is not one of Ebb's dtypes (f64, f32, f16, bf16)") from None


def opmath(dtype: torch.dtype) -> torch.dtype:
    """The dtype PyTorch computes a scalar operand in for tensors of `dtype`:
    f64 for f64, f32 for the others (common practice on CPU: half formats are
    widened to f32 for arithmetic)."""
    return torch.float64 if dtype == torch.float64 else torch.float32
