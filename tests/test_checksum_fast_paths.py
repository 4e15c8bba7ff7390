"""The fast paths of `checksum` give exactly the results of the plain construction.

Reference implementations here are the straightforward versions (one hashlib call over
the little-endian bytes; a mask of finite values; one np.bincount per sketch block), so a
fast path that changed a digest, a statistic or a single bit of a sketch fails.
"""

from __future__ import annotations

import hashlib
import math

import numpy as np
import pytest
import torch

from trainguard.core import checksum


def _hashlib_hex(t: torch.Tensor) -> str:
    # Reference: hashlib.sha256 over a contiguous little-endian copy (hashlib docs).
    return hashlib.sha256(torch.empty(t.shape, dtype=t.dtype).copy_(t).view(torch.uint8).numpy().tobytes()).hexdigest()


def _plain_summary(values: np.ndarray, k: int, chunk: int) -> tuple[tuple, np.ndarray | None]:
    """Masked statistics per chunk and one bincount per block, as the module documents them."""
    flat = np.asarray(values, dtype=np.float64).reshape(-1)
    lo, hi, total, sumsq, finite = math.inf, -math.inf, 0.0, 0.0, 0
    acc = np.zeros(k) if k else None
    bucket, sign = checksum.sketch_pattern(k) if k else (None, None)
    for start in range(0, flat.size, chunk):
        x = flat[start : start + chunk]
        mask = np.isfinite(x)
        good = x[mask]
        if good.size:
            finite += good.size
            lo, hi = min(lo, float(good.min())), max(hi, float(good.max()))
            total += float(good.sum())
            sumsq += float(np.einsum("i,i->", good, good))
        if acc is not None:
            x = np.where(mask, x, 0.0)
            i, pos = 0, start
            while i < x.size:
                block, offset = divmod(pos, checksum.SKETCH_BLOCK)
                n = min(x.size - i, checksum.SKETCH_BLOCK - offset)
                part = np.bincount(bucket[offset : offset + n], weights=x[i : i + n] * sign[offset : offset + n],
                                   minlength=k)
                shift, block_sign = checksum.block_mix(block, k)
                acc += block_sign * np.roll(part, shift)
                i, pos = i + n, pos + n
    nonfinite = flat.size - finite
    if finite == 0:
        return (math.nan,) * 4 + (nonfinite,), acc
    return (lo, hi, total / finite, math.sqrt(sumsq), nonfinite), acc


def _assert_bitwise(got, want) -> None:
    st, sk = got
    ref_st, ref_sk = want
    for value, ref in zip((st.min, st.max, st.mean, st.l2, st.nonfinite), ref_st):
        assert (math.isnan(value) and math.isnan(ref)) or value == ref
    if ref_sk is None:
        assert sk is None
    else:
        assert np.array_equal(sk.view(np.uint64), ref_sk.view(np.uint64))  # every bit, signed zeros included


@pytest.mark.parametrize("size", [1, 7, 4096, 65536, 65537, 200_000, (1 << 20) + 3, 2_500_000])
@pytest.mark.parametrize("bad", [False, True])
def test_small_and_large_paths_match_the_plain_construction(size, bad):
    rng = np.random.default_rng(size)
    x = rng.normal(2.0, 3.0, size=size)
    if bad:
        x[rng.choice(size, max(1, size // 97), replace=False)] = np.nan
        x[0] = -np.inf
    for data, ref in ((torch.from_numpy(x).float(), x.astype(np.float32)), (torch.from_numpy(x), x), (x, x)):
        for k in (0, checksum.TRACE_SKETCH, checksum.STATE_SKETCH):
            want = _plain_summary(ref, k, checksum.STATS_CHUNK_ELEMENTS)
            _assert_bitwise(checksum.summarize(data, k), want)
            digest, st, sk = checksum.describe(data, k)
            _assert_bitwise((st, sk), want)
            if isinstance(data, torch.Tensor):
                assert digest == _hashlib_hex(data)


def test_multi_block_sketch_with_small_chunks_matches_per_block_bincount(monkeypatch):
    monkeypatch.setattr(checksum, "SKETCH_BLOCK", 64)
    monkeypatch.setattr(checksum, "STATS_CHUNK_ELEMENTS", 1000)  # 15.6 blocks per chunk: unaligned chunks
    checksum.sketch_pattern.cache_clear()
    try:
        x = np.random.default_rng(5).standard_normal(5000)
        for k in (16, 256):
            _assert_bitwise(checksum.summarize(torch.from_numpy(x), k), _plain_summary(x, k, 1000))
    finally:
        checksum.sketch_pattern.cache_clear()


def test_threaded_digest_equals_hashlib_and_keeps_statistics(monkeypatch):
    monkeypatch.setattr(checksum, "THREAD_MIN_BYTES", 1)  # every tensor takes the background-thread path
    tensors = [torch.randn(300_001), torch.randn(64, 33).t(), torch.arange(10, dtype=torch.int64),
               torch.randn(5).to(torch.bfloat16), torch.randn(1000, dtype=torch.complex64)]
    for t in tensors:
        digest, st, sk = checksum.describe(t, 16)
        assert digest == _hashlib_hex(torch.view_as_real(t) if t.is_complex() else t)
        assert digest == checksum.sha256_hex(t)
        want_st, want_sk = checksum.summarize(t, 16)
        assert st == want_st and np.array_equal(sk, want_sk)


def test_threaded_digest_error_reaches_the_caller(monkeypatch):
    monkeypatch.setattr(checksum, "THREAD_MIN_BYTES", 1)

    def broken(data):
        raise ValueError("hash failed")
        yield  # pragma: no cover

    monkeypatch.setattr(checksum, "_le_bytes", broken)
    with pytest.raises(ValueError, match="hash failed"):
        checksum.describe(torch.randn(100), 16)


def test_large_contiguous_tensor_is_hashed_in_place():
    # The in-place path hands hashlib the tensor's own storage: one buffer, no copy.
    t = torch.randn(1000)
    pieces = list(checksum.tensor_bytes(t))
    assert len(pieces) == 1 and pieces[0].nbytes == 4000
    assert np.shares_memory(np.asarray(pieces[0]), t.numpy())


def test_one_element_strided_view_hashes_its_element():
    view = torch.arange(6, dtype=torch.float32)[3::2][:1]  # stride 2, one element
    assert checksum.sha256_hex(view) == hashlib.sha256(np.float32(3.0).tobytes()).hexdigest()
