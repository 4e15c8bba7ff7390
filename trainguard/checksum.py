"""Checksums and summary statistics of tensors, computed without full copies.

A golden must identify a tensor's exact bits (so that a bitwise match can be claimed)
and still say something useful about its size when bits differ (so that a tolerance
verdict is possible even when the values themselves were too many to store). Both are
computed in chunks so that hashing a large model needs only a chunk's worth of memory.
"""

from __future__ import annotations

import functools
import hashlib
import math
import sys
from dataclasses import dataclass
from typing import Any, Iterator

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
    return summarize(data)[0]


def _finish(lo: float, hi: float, total: float, sumsq: float, finite: int, nonfinite: int) -> Stats:
    if finite == 0:
        nan = math.nan
        return Stats(nan, nan, nan, nan, nonfinite)
    return Stats(float(lo), float(hi), float(total / finite), float(math.sqrt(sumsq)), nonfinite)


def summarize(data: Any, sketch_size: int = 0) -> tuple[Stats, np.ndarray | None]:
    """Statistics and (when `sketch_size` > 0) a count-sketch of the values, in one chunked pass."""
    lo, hi, total, sumsq, finite, nonfinite = math.inf, -math.inf, 0.0, 0.0, 0, 0
    sketch = np.zeros(sketch_size, dtype=np.float64) if sketch_size else None
    for start, chunk in _float64_chunks(data):
        mask = np.isfinite(chunk)
        all_finite = bool(mask.all())
        good = chunk if all_finite else chunk[mask]
        nonfinite += int(chunk.size - good.size)
        if good.size:
            finite += int(good.size)
            lo = min(lo, float(good.min()))
            hi = max(hi, float(good.max()))
            total += float(good.sum())
            sumsq += float(np.dot(good, good))
        if sketch is not None:
            _sketch_update(sketch, start, chunk if all_finite else np.where(mask, chunk, 0.0))
    return _finish(lo, hi, total, sumsq, finite, nonfinite), sketch


def _float64_chunks(data: Any) -> Iterator[tuple[int, np.ndarray]]:
    """(start position, flat float64 chunk) pairs; complex values as (real, imaginary) pairs."""
    if _is_torch_tensor(data):
        import torch

        tensor = data.detach()
        if tensor.is_complex():
            tensor = torch.view_as_real(tensor)
        flat = tensor.reshape(-1)
        for start in range(0, flat.numel(), STATS_CHUNK_ELEMENTS):
            chunk = flat[start : start + STATS_CHUNK_ELEMENTS].to(device="cpu", dtype=torch.float64)
            yield start, chunk.numpy()
        return
    array = np.asarray(data)
    if np.iscomplexobj(array):
        array = np.stack([array.real, array.imag], axis=-1)
    flat = array.reshape(-1)
    for start in range(0, flat.size, STATS_CHUNK_ELEMENTS):
        yield start, flat[start : start + STATS_CHUNK_ELEMENTS].astype(np.float64)


# -- count-sketch ---------------------------------------------------------------------
#
# A count-sketch (Charikar, Chen & Farach-Colton 2002) maps each position i to a bucket
# h(i) in [0, k) and a sign s(i) in {-1, +1} and keeps S_j = sum over h(i)=j of s(i) x_i.
# For two tensors a, b the squared distance of their sketches, sum_j (S_j(a) - S_j(b))^2,
# is an unbiased estimate of ||a - b||^2 with variance at most 2 ||a - b||^4 / k, so by
# Chebyshev's inequality P(|estimate - ||a-b||^2| >= eps ||a-b||^2) <= 2 / (k eps^2).
# h and s come from SplitMix64 (a fixed, fully specified integer hash) so that sketches
# are identical on every platform: a pattern for one block of positions, and per block a
# random cyclic shift of the buckets and a random sign, so no period in the data lines up.

SKETCH_BLOCK = 1 << 16
#: Sketch sizes: state entries too large to keep their values, and every trace entry.
STATE_SKETCH = 256
TRACE_SKETCH = 16
_SEED = np.uint64(0x7472_6169_6E67_7561)  # "trainguar" in ASCII, an arbitrary fixed seed
_M1, _M2, _GOLDEN = np.uint64(0xBF58476D1CE4E5B9), np.uint64(0x94D049BB133111EB), np.uint64(0x9E3779B97F4A7C15)


def _splitmix64(x: np.ndarray) -> np.ndarray:
    with np.errstate(over="ignore"):
        z = x + _GOLDEN
        z = (z ^ (z >> np.uint64(30))) * _M1
        z = (z ^ (z >> np.uint64(27))) * _M2
        return z ^ (z >> np.uint64(31))


@functools.lru_cache(maxsize=8)
def _pattern(k: int) -> tuple[np.ndarray, np.ndarray]:
    h = _splitmix64(np.arange(SKETCH_BLOCK, dtype=np.uint64) ^ _SEED)
    bucket = ((h >> np.uint64(32)) % np.uint64(k)).astype(np.intp)
    sign = np.where((h & np.uint64(1)) == 1, 1.0, -1.0)
    return bucket, sign


def _block_mix(block: int, k: int) -> tuple[int, float]:
    h = int(_splitmix64(np.array([block], dtype=np.uint64) ^ ~_SEED)[0])
    return (h >> 32) % k, (1.0 if h & 1 else -1.0)


def _sketch_update(acc: np.ndarray, start: int, x: np.ndarray) -> None:
    k = acc.size
    bucket, sign = _pattern(k)
    i, pos = 0, start
    while i < x.size:
        block, offset = divmod(pos, SKETCH_BLOCK)
        n = min(x.size - i, SKETCH_BLOCK - offset)
        part = np.bincount(bucket[offset : offset + n], weights=x[i : i + n] * sign[offset : offset + n], minlength=k)
        shift, block_sign = _block_mix(block, k)
        acc += block_sign * np.roll(part, shift)
        i += n
        pos += n


def sketch(data: Any, size: int) -> np.ndarray:
    """The count-sketch of `data`'s values (non-finite values count as 0)."""
    return summarize(data, size)[1]  # type: ignore[return-value]


def sketch_distance(a: np.ndarray, b: np.ndarray) -> float:
    """Estimated L2 distance of the two tensors the sketches were made from."""
    d = np.asarray(a, dtype=np.float64) - np.asarray(b, dtype=np.float64)
    return float(math.sqrt(float(np.dot(d, d))))


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
