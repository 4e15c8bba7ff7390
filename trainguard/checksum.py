"""Checksums and summary statistics of tensors, computed without full copies.

A golden must identify a tensor's exact bits (so that a bitwise match can be claimed)
and still say something useful about its size when bits differ (so that a tolerance
verdict is possible even when the values themselves were too many to store). Both are
computed in chunks so that hashing a large model needs only a chunk's worth of memory.
"""

from __future__ import annotations

import hashlib
import math
import sys
from dataclasses import dataclass
from typing import Any

import numpy as np

#: Bytes handed to SHA-256 at a time; large enough to amortise call overhead.
HASH_CHUNK_BYTES = 16 * 1024 * 1024
#: Elements converted to float64 at a time for statistics (8 MiB of float64).
STATS_CHUNK_ELEMENTS = 1024 * 1024


@dataclass(frozen=True)
class Stats:
    """float64 summary of a tensor's finite values, plus how many were not finite."""

    min: float
    max: float
    mean: float
    l2: float
    nonfinite: int


def sha256_hex(data: Any) -> str:
    """SHA-256 of a NumPy array's or torch tensor's raw little-endian bytes."""
    if _is_torch_tensor(data):
        return _sha256_tensor(data)
    return _sha256_array(np.asarray(data))


def _is_torch_tensor(obj: Any) -> bool:
    torch = sys.modules.get("torch")
    return torch is not None and isinstance(obj, torch.Tensor)


def _sha256_array(array: np.ndarray) -> str:
    array = np.ascontiguousarray(array)
    if array.dtype.byteorder == ">" or (array.dtype.byteorder == "=" and sys.byteorder == "big"):
        array = array.astype(array.dtype.newbyteorder("<"))
    digest = hashlib.sha256()
    raw = memoryview(array.reshape(-1).view(np.uint8)) if array.size else memoryview(b"")
    for start in range(0, len(raw), HASH_CHUNK_BYTES):
        digest.update(raw[start : start + HASH_CHUNK_BYTES])
    return digest.hexdigest()


def _sha256_tensor(tensor: Any) -> str:
    import torch

    tensor = tensor.detach()
    if tensor.is_complex():
        tensor = torch.view_as_real(tensor)
    digest = hashlib.sha256()
    flat = tensor.reshape(-1)
    if flat.numel() == 0:
        return digest.hexdigest()
    itemsize = flat.element_size()
    step = max(1, HASH_CHUNK_BYTES // itemsize)
    for start in range(0, flat.numel(), step):
        chunk = flat[start : start + step]
        if chunk.device.type != "cpu":
            chunk = chunk.cpu()
        chunk = chunk.contiguous()
        raw = chunk.view(torch.uint8).numpy()
        if sys.byteorder == "big" and itemsize > 1:
            raw = raw.reshape(-1, itemsize)[:, ::-1].copy().reshape(-1)
        digest.update(memoryview(raw))
    return digest.hexdigest()


def stats(data: Any) -> Stats:
    """min, max, mean and L2 norm of the finite values in float64, plus the non-finite count.

    Statistics ignore NaN and Inf so that one bad element does not hide the scale of the
    rest; the non-finite count reports them separately.
    """
    if _is_torch_tensor(data):
        return _stats_tensor(data)
    return _stats_array(np.asarray(data))


def _finish(lo: float, hi: float, total: float, sumsq: float, finite: int, nonfinite: int) -> Stats:
    if finite == 0:
        nan = math.nan
        return Stats(nan, nan, nan, nan, nonfinite)
    return Stats(float(lo), float(hi), float(total / finite), float(math.sqrt(sumsq)), nonfinite)


def _stats_array(array: np.ndarray) -> Stats:
    if np.iscomplexobj(array):
        array = np.stack([array.real, array.imag], axis=-1)
    flat = array.reshape(-1)
    lo, hi, total, sumsq, finite, nonfinite = math.inf, -math.inf, 0.0, 0.0, 0, 0
    for start in range(0, flat.size, STATS_CHUNK_ELEMENTS):
        chunk = flat[start : start + STATS_CHUNK_ELEMENTS].astype(np.float64)
        mask = np.isfinite(chunk)
        good = chunk[mask] if not mask.all() else chunk
        nonfinite += int(chunk.size - good.size)
        if good.size:
            finite += int(good.size)
            lo = min(lo, float(good.min()))
            hi = max(hi, float(good.max()))
            total += float(good.sum())
            sumsq += float(np.dot(good, good))
    return _finish(lo, hi, total, sumsq, finite, nonfinite)


def _stats_tensor(tensor: Any) -> Stats:
    import torch

    tensor = tensor.detach()
    if tensor.is_complex():
        tensor = torch.view_as_real(tensor)
    flat = tensor.reshape(-1)
    lo, hi, total, sumsq, finite, nonfinite = math.inf, -math.inf, 0.0, 0.0, 0, 0
    for start in range(0, flat.numel(), STATS_CHUNK_ELEMENTS):
        chunk = flat[start : start + STATS_CHUNK_ELEMENTS].to(device="cpu", dtype=torch.float64)
        mask = torch.isfinite(chunk)
        n_good = int(mask.sum())
        nonfinite += int(chunk.numel() - n_good)
        if n_good == 0:
            continue
        good = chunk if n_good == chunk.numel() else chunk[mask]
        finite += n_good
        lo = min(lo, float(good.min()))
        hi = max(hi, float(good.max()))
        total += float(good.sum())
        sumsq += float(torch.dot(good, good))
    return _finish(lo, hi, total, sumsq, finite, nonfinite)


def values_float64(data: Any) -> np.ndarray:
    """Flat float64 copy of the values, the form a golden stores them in."""
    if _is_torch_tensor(data):
        import torch

        tensor = data.detach()
        if tensor.is_complex():
            tensor = torch.view_as_real(tensor)
        return tensor.reshape(-1).to(device="cpu", dtype=torch.float64).numpy().copy()
    array = np.asarray(data)
    if np.iscomplexobj(array):
        array = np.stack([array.real, array.imag], axis=-1)
    return array.reshape(-1).astype(np.float64)
