"""Tensors written out as soon as they are recorded, then assembled into the
safetensors sidecar.

A recording holds no tensor longer than the op that made it: each value
(and each gradient PyTorch reports) is appended to a temporary file in the
trace's directory as soon as its node is complete, so memory stays what the
step itself needs, and an in-place write later in the step cannot change
what was recorded. There is one temporary file per element width (8, 4, 2
and 1 bytes); the sidecar lays them out widest first, so every tensor starts
at a multiple of its element size, as a memory map wants.

Each temporary file starts with a hole (no disk space) reserved for the
safetensors header. For a big sidecar the file holding the most bytes (the
*lead*, f32 in an f32 step) becomes the sidecar itself: the entries of
wider elements (an int64 batch of labels) go at the end of the hole, the
header before them (padded with spaces), and the narrower files are
appended after the lead's data, so the bulk of the data is written once and
every tensor still starts at a multiple of its element size. A small
sidecar, or one whose header and wider entries outgrow the hole, is
assembled by copying the entries into a new file.
"""

from __future__ import annotations

import json
import os
import struct
import tempfile
import time
from dataclasses import dataclass
from pathlib import Path
from typing import BinaryIO, Iterable

import numpy as np
import torch

from .dtypes import SAFETENSORS_NAME


@dataclass(frozen=True)
class Stored:
    """A tensor written to a spill file."""

    name: str
    dtype: torch.dtype
    shape: tuple[int, ...]
    width: int  # element size in bytes: which spill file
    offset: int
    nbytes: int
    serial: int  # order of writing

    def numel(self) -> int:
        n = 1
        for s in self.shape:
            n *= s
        return n


def tensor_bytes(t: torch.Tensor) -> memoryview:
    """The tensor's elements, row-major, little-endian."""
    t = t.detach().to("cpu").contiguous()
    if t.dtype == torch.bfloat16:
        t = t.view(torch.int16)
    array = t.numpy()
    if array.dtype.byteorder == ">":
        array = array.byteswap()
    return memoryview(np.ascontiguousarray(array)).cast("B")


# Bytes reserved for the safetensors header at the start of each spill
# file: room for some 15,000 entries.
RESERVED = 1 << 21


class Spill:
    """Temporary files beside the trace, one per element width."""

    def __init__(self, directory: Path, stem: str) -> None:
        self.directory = directory
        self.stem = stem
        self._files: dict[int, tuple[str, BinaryIO]] = {}
        self._sizes: dict[int, int] = {}
        self._serial = 0
        self._everything: list[Stored] = []
        self._names: set[str] = set()
        self.seconds = 0.0  # spent storing tensors (copies to row-major order, writes)

    def put(self, name: str, t: torch.Tensor) -> Stored:
        """Writes `t` under `name` (made unique if taken)."""
        if name in self._names:
            k = 2
            while f"{name}#{k}" in self._names:
                k += 1
            name = f"{name}#{k}"
        self._names.add(name)
        if t.dtype not in SAFETENSORS_NAME:
            raise ValueError(f"cannot store {t.dtype} in a trace sidecar")
        width = t.element_size()
        if width not in self._files:
            self.directory.mkdir(parents=True, exist_ok=True)
            fd, path = tempfile.mkstemp(prefix=f".{self.stem}.spill{width}.", suffix=".tmp", dir=self.directory)
            f = os.fdopen(fd, "w+b")
            f.seek(RESERVED)
            self._files[width] = (path, f)
            self._sizes[width] = 0
        start = time.perf_counter()
        data = tensor_bytes(t)
        _, f = self._files[width]
        f.write(data)
        self.seconds += time.perf_counter() - start
        offset = self._sizes[width]
        self._sizes[width] += len(data)
        self._serial += 1
        stored = Stored(name, t.dtype, tuple(t.shape), width, offset, len(data), self._serial)
        self._everything.append(stored)
        return stored

    def read(self, stored: Stored) -> torch.Tensor:
        """A stored tensor read back (for the few values needed again)."""
        _, f = self._files[stored.width]
        f.flush()
        raw = os.pread(f.fileno(), stored.nbytes, RESERVED + stored.offset)
        if stored.dtype == torch.bfloat16:
            return torch.frombuffer(bytearray(raw), dtype=torch.int16).view(torch.bfloat16).reshape(stored.shape)
        return torch.frombuffer(bytearray(raw), dtype=stored.dtype).reshape(stored.shape)

    def sidecar(self, entries: Iterable[Stored]) -> str:
        """A complete safetensors file holding at least `entries`, at a
        temporary path in the directory (the caller renames it). Everything
        written to the lead spill file stays in the sidecar (entries of
        pruned nodes included: the data must be contiguous); of the other
        files, only `entries`."""
        wanted = {e.serial: e for e in entries}
        if not self._files:
            raise AssertionError("no tensor was stored")
        lead = max(self._files, key=lambda w: (self._sizes[w], w))
        kept = sorted((e for e in self._everything if e.width == lead), key=lambda e: e.serial)
        wider = sorted((e for e in wanted.values() if e.width > lead), key=lambda e: (-e.width, e.serial))
        narrower = sorted((e for e in wanted.values() if e.width < lead), key=lambda e: (-e.width, e.serial))
        # The data section starts where the wider entries do, so that they
        # end exactly where the lead's data begins (at RESERVED).
        before = sum(e.nbytes for e in wider)
        start = RESERVED - before
        order = wider + kept + narrower
        header = _header(order)
        data = sum(e.nbytes for e in order)
        aligned = not wider or start % wider[0].width == 0
        # The hole is padded with spaces: worth it only for big sidecars.
        if not aligned or len(header) + 8 > start or RESERVED > data // 100:
            return self._assemble(sorted(wanted.values(), key=lambda e: (-e.width, e.serial)))
        path, f = self._files[lead]
        f.flush()
        # The header fills the hole up to the wider entries: safetensors
        # allows trailing spaces.
        header += b" " * (start - 8 - len(header))
        os.pwrite(f.fileno(), struct.pack("<Q", len(header)) + header, 0)
        f.seek(start)
        f.flush()
        for e in wider:
            self._copy_entry(e, f.fileno())
        f.seek(RESERVED + self._sizes[lead])
        f.flush()
        for e in narrower:
            self._copy_entry(e, f.fileno())
        f.close()
        del self._files[lead]
        return path

    def _copy_entry(self, e: Stored, target: int) -> None:
        """Appends `e`'s bytes at `target`'s position."""
        source = self._files[e.width][1]
        source.flush()
        _copy(source.fileno(), target, RESERVED + e.offset, e.nbytes)

    def _assemble(self, order: list[Stored]) -> str:
        header = _header(order)
        fd, path = tempfile.mkstemp(prefix=f".{self.stem}.sidecar.", suffix=".tmp", dir=self.directory)
        try:
            with os.fdopen(fd, "wb") as out:
                out.write(struct.pack("<Q", len(header)) + header)
                out.flush()
                runs: list[tuple[int, int, int]] = []  # width, start, length
                for e in order:
                    if runs and runs[-1][0] == e.width and runs[-1][1] + runs[-1][2] == e.offset:
                        runs[-1] = (e.width, runs[-1][1], runs[-1][2] + e.nbytes)
                    else:
                        runs.append((e.width, e.offset, e.nbytes))
                for width, start, length in runs:
                    source = self._files[width][1]
                    source.flush()
                    _copy(source.fileno(), out.fileno(), RESERVED + start, length)
        except BaseException:
            os.unlink(path)
            raise
        return path

    def close(self) -> None:
        """Removes the temporary files."""
        for path, f in self._files.values():
            f.close()
            try:
                os.unlink(path)
            except FileNotFoundError:
                pass
        self._files = {}


def _copy(source: int, target: int, start: int, length: int) -> None:
    """Copies bytes between files inside the kernel where it can."""
    done = 0
    while done < length:
        try:
            n = os.copy_file_range(source, target, length - done, start + done)
        except (AttributeError, OSError):
            n = 0
        if n == 0:
            chunk = os.pread(source, min(1 << 24, length - done), start + done)
            if not chunk:
                raise OSError("a spill file ended early")
            n = os.write(target, chunk)
        done += n


def _header(order: list[Stored]) -> bytes:
    """safetensors' JSON header for entries laid out back to back in `order`,
    padded with spaces to a multiple of 8."""
    header: dict[str, dict[str, object]] = {}
    offset = 0
    for e in order:
        header[e.name] = {
            "dtype": SAFETENSORS_NAME[e.dtype],
            "shape": list(e.shape),
            "data_offsets": [offset, offset + e.nbytes],
        }
        offset += e.nbytes
    text = json.dumps(header, separators=(",", ":")).encode()
    return text + b" " * (-len(text) % 8)
