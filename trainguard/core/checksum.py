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
import threading
from typing import Any, Iterator

import numpy as np

from .records import Stats

#: Bytes copied at a time when a tensor's bytes cannot be hashed in place (a non-contiguous
#: or non-CPU tensor, a big-endian host or array); contiguous CPU data is hashed in place.
HASH_CHUNK_BYTES = 16 * 1024 * 1024
#: Elements converted to float64 at a time for statistics (8 MiB of float64).
STATS_CHUNK_ELEMENTS = 1024 * 1024
#: Tensors of at least this many bytes are hashed in a background thread while the
#: statistics and sketch run in the calling thread (hashlib releases the GIL while it hashes).
THREAD_MIN_BYTES = 4 * 1024 * 1024
#: Tensors up to this many elements take the short path (one float64 copy, no buffers):
#: the per-step trace records many small tensors, where fixed costs dominate.
SMALL_ELEMENTS = 1 << 16


def sha256_hex(data: Any) -> str:
    """SHA-256 of a NumPy array's or torch tensor's raw little-endian bytes."""
    digest = hashlib.sha256()
    for piece in _le_bytes(data):
        digest.update(piece)
    return digest.hexdigest()


def describe(data: Any, sketch_size: int = 0) -> tuple[str, Stats, np.ndarray | None]:
    """`sha256_hex(data)` and `summarize(data, sketch_size)` together, in one call.

    For tensors of `THREAD_MIN_BYTES` or more the digest is computed in a background thread
    while statistics and sketch run here, so recording a large tensor takes about as long
    as hashing it. The results are exactly those of the two separate calls.
    """
    if _nbytes(data) < THREAD_MIN_BYTES:
        return (sha256_hex(data), *summarize(data, sketch_size))
    box: dict[str, Any] = {}

    def work() -> None:
        try:
            box["digest"] = sha256_hex(data)
        except BaseException as exc:  # handed to the calling thread below
            box["error"] = exc

    thread = threading.Thread(target=work, name="trainguard-sha256", daemon=True)
    thread.start()
    try:
        st, sk = summarize(data, sketch_size)
    finally:
        thread.join()
    if "error" in box:
        raise box["error"]
    return box["digest"], st, sk


def is_tensor(obj: Any) -> bool:
    """A torch tensor, checked without importing torch (a process that never imported it has none)."""
    torch = sys.modules.get("torch")
    return torch is not None and isinstance(obj, torch.Tensor)


def _nbytes(data: Any) -> int:
    if is_tensor(data):
        return int(data.numel()) * int(data.element_size())
    return int(getattr(data, "nbytes", 0))


def _le_bytes(data: Any) -> Iterator[memoryview]:
    """The little-endian bytes of `data` in row-major order, without a full copy where possible."""
    if is_tensor(data):
        yield from tensor_bytes(data)
        return
    array = np.asarray(data)
    if array.size == 0:
        return
    big = array.dtype.byteorder == ">" or (array.dtype.byteorder == "=" and sys.byteorder == "big")
    if array.flags.c_contiguous and not big:
        yield memoryview(array.reshape(-1).view(np.uint8))  # in place: no copy
        return
    flat = array.reshape(-1)  # a copy only when the array is not contiguous
    little = flat.dtype.newbyteorder("<")
    step = max(1, HASH_CHUNK_BYTES // flat.itemsize)
    for start in range(0, flat.size, step):
        yield memoryview(flat[start : start + step].astype(little).view(np.uint8))


def tensor_bytes(tensor: Any) -> Iterator[memoryview]:
    import torch

    tensor = tensor.detach()
    if tensor.is_complex():
        tensor = torch.view_as_real(tensor)
    if tensor.numel() == 0:
        return
    itemsize = tensor.element_size()
    in_place = tensor.device.type == "cpu" and tensor.is_contiguous() and (sys.byteorder == "little" or itemsize == 1)
    if in_place:
        # The tensor's own storage through the buffer protocol: hashed in one call, no copy.
        flat = tensor.reshape(-1)
        if flat.stride(0) != 1:  # a one-element view keeps its stride
            flat = flat.as_strided(flat.shape, (1,))
        yield memoryview(flat.view(torch.uint8).numpy())
        return
    flat = tensor.reshape(-1)
    step = max(1, HASH_CHUNK_BYTES // itemsize)
    for start in range(0, flat.numel(), step):
        chunk = flat[start : start + step]
        if chunk.device.type != "cpu":
            chunk = chunk.cpu()
        raw = chunk.contiguous().view(torch.uint8).numpy()
        if sys.byteorder == "big" and itemsize > 1:
            raw = raw.reshape(-1, itemsize)[:, ::-1].copy().reshape(-1)
        yield memoryview(raw)


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
    """Statistics and (when `sketch_size` > 0) a count-sketch of the values, in one chunked pass.

    Per chunk of `STATS_CHUNK_ELEMENTS`: min and max first (NaN propagates through both, so
    finite bounds prove every value finite and no mask is needed); then the float64 sum
    (NumPy's pairwise sum) and sum of squares (`np.einsum`) of the chunk, accumulated over
    chunks in order. Chunks holding NaN or Inf drop those values first.
    """
    lo, hi, total, sumsq, finite, nonfinite = math.inf, -math.inf, 0.0, 0.0, 0, 0
    sketch = np.zeros(sketch_size, dtype=np.float64) if sketch_size else None
    scratch: list[np.ndarray] = []  # the sketch's weight buffer, reused by every chunk
    for start, chunk, bounds in _float64_chunks(data):
        c_lo, c_hi = bounds if bounds is not None else (float(chunk.min()), float(chunk.max()))
        if math.isfinite(c_lo) and math.isfinite(c_hi):
            finite += int(chunk.size)
            lo = min(lo, c_lo)
            hi = max(hi, c_hi)
            total += float(chunk.sum())
            sumsq += _sum_of_squares(chunk)
            if sketch is not None:
                _sketch_update(sketch, start, chunk, scratch)
            continue
        mask = np.isfinite(chunk)
        good = chunk[mask]
        nonfinite += int(chunk.size - good.size)
        if good.size:
            finite += int(good.size)
            lo = min(lo, float(good.min()))
            hi = max(hi, float(good.max()))
            total += float(good.sum())
            sumsq += _sum_of_squares(good)
        if sketch is not None:
            _sketch_update(sketch, start, np.where(mask, chunk, 0.0), scratch)
    return _finish(lo, hi, total, sumsq, finite, nonfinite), sketch


def _sum_of_squares(x: np.ndarray) -> float:
    """sum(x * x) in float64 with NumPy's own single-threaded loop (`np.einsum`).

    Not `np.dot`: that calls BLAS, whose ddot may split the sum over its own threads, so its
    last bits depend on the BLAS thread count, and its busy-waiting threads made a 20,000-element
    call take over 10 ms on a loaded 2-core machine (benchmarks/RESULTS.md).
    """
    return float(np.einsum("i,i->", x, x))


def _float64_chunks(data: Any) -> Iterator[tuple[int, np.ndarray, tuple[float, float] | None]]:
    """(start position, flat float64 chunk, (min, max) or None) triples; complex values as
    (real, imaginary) pairs. A chunk may live in a buffer that the next chunk overwrites.
    The bounds, when given, are the chunk's min and max (NaN if it holds a NaN)."""
    if is_tensor(data):
        import torch

        tensor = data.detach()
        if tensor.is_complex():
            tensor = torch.view_as_real(tensor)
        flat = tensor.reshape(-1)
        n = flat.numel()
        if n == 0:
            return
        step = STATS_CHUNK_ELEMENTS
        if n <= min(SMALL_ELEMENTS, STATS_CHUNK_ELEMENTS):  # one chunk: a plain conversion costs less than the buffers below
            yield 0, flat.to(device="cpu", dtype=torch.float64).numpy(), None
            return
        floating = flat.is_floating_point()
        direct = flat.dtype == torch.float64 and flat.device.type == "cpu"
        buffer = None if direct else torch.empty(min(n, step), dtype=torch.float64)
        for start in range(0, n, step):
            src = flat[start : start + step]
            if src.device.type != "cpu":
                src = src.cpu()
            bounds = None
            if floating:
                try:
                    lo, hi = torch.aminmax(src)  # in the tensor's own dtype: exact when widened
                    bounds = (float(lo), float(hi))
                except (RuntimeError, NotImplementedError):  # dtypes without aminmax (float8)
                    bounds = None
            if direct:
                yield start, src.numpy(), bounds
            else:
                out = buffer[: src.numel()]  # type: ignore[index]
                out.copy_(src)
                yield start, out.numpy(), bounds
        return
    array = np.asarray(data)
    if np.iscomplexobj(array):
        array = np.stack([array.real, array.imag], axis=-1)
    flat = array.reshape(-1)
    if flat.size == 0:
        return
    step = STATS_CHUNK_ELEMENTS
    direct = flat.dtype == np.float64 and flat.dtype.isnative
    buffer = None if direct else np.empty(min(flat.size, step), dtype=np.float64)
    for start in range(0, flat.size, step):
        src = flat[start : start + step]
        if direct:
            yield start, src, None
        else:
            out = buffer[: src.size]  # type: ignore[index]
            np.copyto(out, src, casting="unsafe")
            yield start, out, None


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
#: Sketch sizes: state entries too large to keep their values, and every trace entry. 1024
#: buckets (golden format 3; 256 before) keep a few moved elements apart, each alone in its
#: bucket, so the bucket differences estimate the largest elementwise difference (see
#: `tolerance.sketch_estimate`).
STATE_SKETCH = 1024
TRACE_SKETCH = 16
SKETCH_SEED = np.uint64(0x7472_6169_6E67_7561)  # "trainguar" in ASCII, an arbitrary fixed seed
_M1, _M2, _GOLDEN = np.uint64(0xBF58476D1CE4E5B9), np.uint64(0x94D049BB133111EB), np.uint64(0x9E3779B97F4A7C15)


def splitmix64(x: np.ndarray) -> np.ndarray:
    with np.errstate(over="ignore"):
        z = x + _GOLDEN
        z = (z ^ (z >> np.uint64(30))) * _M1
        z = (z ^ (z >> np.uint64(27))) * _M2
        return z ^ (z >> np.uint64(31))


@functools.lru_cache(maxsize=8)
def sketch_pattern(k: int) -> tuple[np.ndarray, np.ndarray]:
    h = splitmix64(np.arange(SKETCH_BLOCK, dtype=np.uint64) ^ SKETCH_SEED)
    bucket = ((h >> np.uint64(32)) % np.uint64(k)).astype(np.intp)
    sign = np.where((h & np.uint64(1)) == 1, 1.0, -1.0)
    return bucket, sign


@functools.lru_cache(maxsize=4096)
def block_mix(block: int, k: int) -> tuple[int, float]:
    h = int(splitmix64(np.array([block], dtype=np.uint64) ^ ~SKETCH_SEED)[0])
    return (h >> 32) % k, (1.0 if h & 1 else -1.0)


@functools.lru_cache(maxsize=4)
def _tiled(k: int, block_size: int, blocks: int) -> tuple[np.ndarray, np.ndarray]:
    """Bucket index (block * k + bucket) and sign of every position in `blocks` whole blocks."""
    bucket, sign = sketch_pattern(k)
    index = (np.arange(blocks, dtype=np.intp)[:, None] * k + bucket[None, :]).reshape(-1)
    return index, np.tile(sign, blocks)


@functools.lru_cache(maxsize=8)
def _folded(k: int, block_size: int, block: int) -> tuple[np.ndarray, np.ndarray]:
    """Bucket and sign of every position of one block, with the block's shift and sign applied."""
    bucket, sign = sketch_pattern(k)
    shift, block_sign = block_mix(block, k)
    return (bucket + shift) % k, sign * block_sign


def _sketch_update(acc: np.ndarray, start: int, x: np.ndarray, scratch: list[np.ndarray] | None = None) -> None:
    """Add the values `x`, found at positions start, start+1, ... of the tensor, to the sketch `acc`.

    Every block of `SKETCH_BLOCK` positions is bucketed on its own, then cyclically shifted,
    signed and added to `acc` in block order. One `np.bincount` serves all blocks of `x`
    (bucket b of block j is cell j*k + b): each cell still sums its values one by one in
    position order, so the result is bit for bit that of one bincount per block.
    """
    k = acc.size
    n = x.size
    if n == 0:
        return
    block_size = SKETCH_BLOCK
    bucket, sign = sketch_pattern(k)
    first, offset = divmod(start, block_size)
    blocks = -(-(offset + n) // block_size)
    if blocks == 1:
        # The block's shift and sign folded into its pattern: bucket b of the block lands in
        # cell (b + shift) % k, and every weight carries the block's sign (multiplying by +-1
        # is exact and rounding is symmetric in sign, so the sum is the same as before).
        index, signs = _folded(k, block_size, first)
        index, signs = index[offset : offset + n], signs[offset : offset + n]
        weights = x * signs
        acc += np.bincount(index, weights=weights, minlength=k)
        return
    if offset == 0 and blocks <= max(1, -(-STATS_CHUNK_ELEMENTS // block_size)):
        index, signs = _tiled(k, block_size, blocks)
        index, signs = index[:n], signs[:n]
    else:
        pos = np.arange(offset, offset + n, dtype=np.intp)
        within = pos % block_size
        index = (pos // block_size) * k + bucket[within]
        signs = sign[within]
    if scratch is not None:
        if not scratch or scratch[0].size < n:  # the first chunk is the largest
            scratch[:] = [np.empty(n, dtype=np.float64)]
        weights = np.multiply(x, signs, out=scratch[0][:n])
    else:
        weights = x * signs
    parts = np.bincount(index, weights=weights, minlength=blocks * k).reshape(blocks, k)
    for j in range(blocks):
        shift, block_sign = block_mix(first + j, k)
        acc += block_sign * np.roll(parts[j], shift)


def sketch(data: Any, size: int) -> np.ndarray:
    """The count-sketch of `data`'s values (non-finite values count as 0)."""
    return summarize(data, size)[1]  # type: ignore[return-value]


def sketch_distance(a: np.ndarray, b: np.ndarray) -> float:
    """Estimated L2 distance of the two tensors the sketches were made from."""
    d = np.asarray(a, dtype=np.float64) - np.asarray(b, dtype=np.float64)
    return float(math.sqrt(float(np.dot(d, d))))


def values_float64(data: Any) -> np.ndarray:
    """Flat float64 copy of the values, the form a golden stores them in."""
    if is_tensor(data):
        import torch

        tensor = data.detach()
        if tensor.is_complex():
            tensor = torch.view_as_real(tensor)
        return tensor.reshape(-1).to(device="cpu", dtype=torch.float64, copy=True).numpy()  # never the tensor's own memory
    array = np.asarray(data)
    if np.iscomplexobj(array):
        array = np.stack([array.real, array.imag], axis=-1)
    return array.reshape(-1).astype(np.float64)
