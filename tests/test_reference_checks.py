"""trainguard's core rules checked against sources outside the project.

Every expected value here comes from an outside reference (a standard, the Python
standard library, NumPy, or a file-format specification), named in a comment beside the
check. Nothing is compared against a value that trainguard itself produced.
"""

from __future__ import annotations

import hashlib
import math
import struct

import numpy as np
import pandas as pd
import pyarrow.parquet as pq
import pytest
import torch
from hypothesis import given, settings
from hypothesis import strategies as st
from hypothesis.extra import numpy as hnp

import trainguard
from trainguard.core import checksum
from trainguard.core.capture import Trajectory
from trainguard.core.records import MetricSeries, Run
from trainguard.core.tolerance import Tolerance, within

# -- SHA-256 -------------------------------------------------------------------------


def test_hashlib_reproduces_the_fips_180_4_test_vector():
    # Source: FIPS 180-4 / NIST example "SHA256.pdf": SHA-256("abc").
    assert hashlib.sha256(b"abc").hexdigest() == (
        "ba7816bf8f01cfea414140de5dae2223b00361a396177a9cb410ff61f20015ad"
    )


def test_checksum_of_the_abc_bytes_is_the_fips_vector():
    # Source: FIPS 180-4 SHA-256("abc"); the three bytes 0x61 0x62 0x63 as a uint8 array,
    # so trainguard's own byte path is checked against the published digest directly.
    data = np.frombuffer(b"abc", dtype=np.uint8)
    expected = "ba7816bf8f01cfea414140de5dae2223b00361a396177a9cb410ff61f20015ad"
    assert checksum.sha256_hex(data) == expected
    assert checksum.sha256_hex(torch.tensor([0x61, 0x62, 0x63], dtype=torch.uint8)) == expected


def _struct_sha(fmt: str, values) -> str:
    # Source: Python `struct` docs: '<' = little-endian, standard sizes; 'f' = IEEE 754
    # binary32, 'd' = binary64, 'q' = 8-byte signed integer.
    return hashlib.sha256(struct.pack("<%d%s" % (len(values), fmt), *values)).hexdigest()


def test_float32_tensor_hash_is_sha256_of_little_endian_binary32():
    values = [1.0, -2.5, 0.1, 3.4028234663852886e38, -0.0, 1e-45]
    t = torch.tensor(values, dtype=torch.float32)
    # values round-trip through binary32 exactly as struct does (IEEE 754 round-to-nearest).
    assert checksum.sha256_hex(t) == _struct_sha("f", values)


def test_float64_tensor_hash_is_sha256_of_little_endian_binary64():
    values = [math.pi, -1e300, 5e-324, 0.0, -0.0, 2.0**-52]
    t = torch.tensor(values, dtype=torch.float64)
    assert checksum.sha256_hex(t) == _struct_sha("d", values)


def test_int64_tensor_hash_is_sha256_of_little_endian_int64():
    values = [0, 1, -1, 2**63 - 1, -(2**63), 123456789]
    t = torch.tensor(values, dtype=torch.int64)
    assert checksum.sha256_hex(t) == _struct_sha("q", values)


def test_float_special_values_hash_by_their_bits():
    # Source: IEEE 754 binary64 encodings: +Inf = 0x7FF0000000000000, -Inf = 0xFFF0...0,
    # quiet NaN 0x7FF8000000000000 (the canonical quiet NaN; recalled from memory).
    bits = [0x7FF0000000000000, 0xFFF0000000000000, 0x7FF8000000000000]
    raw = struct.pack("<3Q", *bits)
    t = torch.tensor([math.inf, -math.inf, math.nan], dtype=torch.float64)
    assert t.view(torch.int64).tolist()[2] == 0x7FF8000000000000  # torch's NaN is the canonical one
    assert checksum.sha256_hex(t) == hashlib.sha256(raw).hexdigest()


def test_bfloat16_hash_is_sha256_of_the_upper_half_of_binary32():
    # Source: bfloat16 is the top 16 bits of an IEEE 754 binary32 (Intel, "BFLOAT16 -
    # Hardware Numerics Definition", 2018); values below are exactly representable in it.
    values = [1.0, -2.5, 0.15625, 256.0, -0.0, 3.0]
    t = torch.tensor(values, dtype=torch.bfloat16)
    upper = b"".join(struct.pack("<f", v)[2:4] for v in values)  # little-endian: high half last
    assert checksum.sha256_hex(t) == hashlib.sha256(upper).hexdigest()
    # and the same bytes torch exposes through a uint8 view (FIELD-NOTES: t.view(torch.uint8))
    assert bytes(t.view(torch.uint8).numpy().tobytes()) == upper


def test_noncontiguous_tensor_hashes_its_elements_in_row_major_order():
    base = torch.arange(24, dtype=torch.float32).reshape(4, 6) * 0.37 - 1.0
    for view in (base.t(), base[:, ::2], base[1:3, 1:5], base.t()[::2]):
        assert not view.is_contiguous()
        # Source: NumPy docs, ndarray.tobytes(order='C'): bytes in row-major (C) order;
        # '<f4' = little-endian binary32.
        expected = hashlib.sha256(view.numpy().astype("<f4").tobytes(order="C")).hexdigest()
        assert checksum.sha256_hex(view) == expected
        assert checksum.sha256_hex(view.numpy()) == expected


@pytest.mark.parametrize("dtype", [torch.float32, torch.float64, torch.int64, torch.bfloat16])
def test_empty_tensor_hash_is_sha256_of_no_bytes(dtype):
    # SHA-256 of the empty message; value recalled from memory, confirmed by hashlib.
    empty = "e3b0c44298fc1c149afbf4c8996fb92427ae41e4649b934ca495991b7852b855"
    assert hashlib.sha256(b"").hexdigest() == empty
    assert checksum.sha256_hex(torch.empty(0, dtype=dtype)) == empty
    assert checksum.sha256_hex(torch.empty(3, 0, dtype=dtype)) == empty
    assert checksum.sha256_hex(np.empty((0, 4), dtype=np.float64)) == empty


@pytest.mark.parametrize("code", ["f4", "f8", "i8", "i4", "u2", "c8"])
def test_big_endian_numpy_array_hashes_like_little_endian(code):
    rng = np.random.default_rng(11)
    raw = rng.normal(size=(5, 7)) * 1000
    if code[0] == "c":
        raw = raw + 1j * rng.normal(size=(5, 7))
    little = raw.astype("<" + code)
    big = raw.astype(">" + code)
    # Source: NumPy dtype byte-order characters ('<' little, '>' big), NumPy docs
    # "Byte-swapping"; the two arrays hold equal values in different byte orders.
    assert np.array_equal(little, big)
    assert little.tobytes() != big.tobytes() or little.dtype.itemsize == 1
    expected = hashlib.sha256(little.tobytes()).hexdigest()
    assert checksum.sha256_hex(little) == expected
    assert checksum.sha256_hex(big) == expected
    # Non-contiguous big-endian view: row-major element order (NumPy tobytes, order='C').
    view = big[:, ::3].T
    assert checksum.sha256_hex(view) == hashlib.sha256(view.astype("<" + code).tobytes()).hexdigest()


def test_tensor_and_numpy_array_of_the_same_values_hash_alike():
    rng = np.random.default_rng(3)
    arr = rng.normal(size=(8, 3)).astype(np.float32)
    expected = hashlib.sha256(arr.astype("<f4").tobytes()).hexdigest()  # hashlib + NumPy '<f4'
    assert checksum.sha256_hex(torch.from_numpy(arr)) == expected
    assert checksum.sha256_hex(arr) == expected


def test_complex_tensor_hashes_interleaved_real_and_imaginary_parts():
    # Source: NumPy docs, complex64 = two binary32 (real, imaginary) per element.
    arr = np.array([1 + 2j, -0.5 + 0.25j, 3 - 4j], dtype=np.complex64)
    expected = hashlib.sha256(struct.pack("<6f", 1, 2, -0.5, 0.25, 3, -4)).hexdigest()
    assert hashlib.sha256(arr.astype("<c8").tobytes()).hexdigest() == expected
    assert checksum.sha256_hex(torch.from_numpy(arr)) == expected
    assert checksum.sha256_hex(arr) == expected


@pytest.mark.parametrize("chunk", [1, 3, 7, 64])
def test_chunked_hashing_gives_the_same_digest(monkeypatch, chunk):
    rng = np.random.default_rng(chunk)
    arr = rng.normal(size=1001)  # 8008 bytes: many chunks, a ragged last one
    tensors = [
        torch.from_numpy(arr.astype(np.float32)),
        torch.from_numpy(arr),
        torch.from_numpy(arr).to(torch.bfloat16),
        torch.from_numpy((arr * 1e6).astype(np.int64)),
        torch.from_numpy(arr).reshape(7, 143).t(),  # non-contiguous
    ]
    # Reference: one hashlib call over the whole little-endian buffer (hashlib docs:
    # repeated update() calls equal a single call on the concatenation).
    expected = [hashlib.sha256(t.contiguous().view(torch.uint8).numpy().tobytes()).hexdigest() for t in tensors]
    arrays = [arr, arr.astype(">f8"), arr.reshape(7, 143).T]
    expected_arrays = [hashlib.sha256(np.ascontiguousarray(a).astype("<f8").tobytes()).hexdigest() for a in arrays]
    monkeypatch.setattr(checksum, "HASH_CHUNK_BYTES", chunk)
    assert [checksum.sha256_hex(t) for t in tensors] == expected
    assert [checksum.sha256_hex(a) for a in arrays] == expected_arrays


# -- statistics ----------------------------------------------------------------------


def _numpy_stats(values: np.ndarray):
    # Reference: NumPy's own min/max/mean and np.linalg.norm (2-norm of a vector), over the
    # finite values (np.isfinite), in float64.
    flat = np.asarray(values, dtype=np.float64).reshape(-1)
    good = flat[np.isfinite(flat)]
    nonfinite = int(flat.size - good.size)
    if good.size == 0:
        return (math.nan,) * 4 + (nonfinite,)
    return float(good.min()), float(good.max()), float(good.mean()), float(np.linalg.norm(good)), nonfinite


def _assert_stats_match(got, want):
    assert got.nonfinite == want[4]
    for value, ref in zip((got.min, got.max, got.mean, got.l2), want[:4]):
        if math.isnan(ref):
            assert math.isnan(value)
        else:
            # summation order differs (chunks vs NumPy's pairwise sum): a few float64 ulps,
            # bound chosen as common practice, not from a source.
            assert value == pytest.approx(ref, rel=1e-12, abs=1e-12)


def _random_data(seed: int, size: int, bad_fraction: float) -> np.ndarray:
    rng = np.random.default_rng(seed)
    x = rng.normal(loc=rng.uniform(-5, 5), scale=rng.uniform(0.01, 100), size=size)
    if size and bad_fraction:
        idx = rng.choice(size, size=max(1, int(size * bad_fraction)), replace=False)
        x[idx] = rng.choice([np.nan, np.inf, -np.inf], size=idx.size)
    return x


CASES = [(seed, size, bad) for seed, (size, bad) in enumerate(
    [(1, 0.0), (2, 0.5), (17, 0.0), (100, 0.1), (1000, 0.02), (4097, 0.3), (50, 1.0), (0, 0.0)]
)]


@pytest.mark.parametrize("small_chunks", [False, True])
@pytest.mark.parametrize("seed,size,bad", CASES)
def test_statistics_agree_with_numpy(monkeypatch, seed, size, bad, small_chunks):
    if small_chunks:
        monkeypatch.setattr(checksum, "STATS_CHUNK_ELEMENTS", 3)
    x = _random_data(seed, size, bad)
    want64 = _numpy_stats(x)
    _assert_stats_match(checksum.stats(x), want64)
    _assert_stats_match(checksum.stats(torch.from_numpy(x)), want64)
    # float32 data: statistics of the float32 values, widened to float64
    x32 = x.astype(np.float32)
    want32 = _numpy_stats(x32.astype(np.float64))
    _assert_stats_match(checksum.stats(x32), want32)
    _assert_stats_match(checksum.stats(torch.from_numpy(x32)), want32)
    # non-contiguous tensor view
    if size >= 4:
        view = torch.from_numpy(x)[::2]
        _assert_stats_match(checksum.stats(view), _numpy_stats(x[::2]))


def test_statistics_of_known_values():
    # Hand arithmetic: finite values 3, -4, 12 -> min -4, max 12, mean 11/3,
    # L2 = sqrt(9 + 16 + 144) = 13; two non-finite values (NaN, +Inf).
    got = checksum.stats(torch.tensor([3.0, math.nan, -4.0, math.inf, 12.0]))
    assert (got.min, got.max, got.l2, got.nonfinite) == (-4.0, 12.0, 13.0, 2)
    assert got.mean == pytest.approx(11.0 / 3.0, rel=1e-15)


# -- tolerance rule --------------------------------------------------------------------

_any_float = st.floats(allow_nan=True, allow_infinity=True, width=64)
_moderate = st.floats(min_value=-1e6, max_value=1e6, allow_nan=False)


@st.composite
def _golden_and_new(draw):
    golden = draw(st.one_of(_any_float, _moderate, st.sampled_from([0.0, -0.0, math.inf, -math.inf, math.nan])))
    how = draw(st.sampled_from(["free", "near", "boundary", "same", "signflip"]))
    if how == "boundary":
        # right at the edge of the allowed band: |new - golden| = s * (atol + rtol * |golden|)
        # with s near 1 (filled in by the caller, which knows the tolerance)
        return golden, ("boundary", draw(st.sampled_from([1.0, -1.0])), draw(st.floats(min_value=0.97, max_value=1.03)))
    if how == "free":
        new = draw(st.one_of(_any_float, _moderate))
    elif how == "near":
        # near the tolerance boundary: a small relative and absolute perturbation
        rel = draw(st.floats(min_value=-1e-3, max_value=1e-3))
        shift = draw(st.floats(min_value=-1e-6, max_value=1e-6))
        with np.errstate(over="ignore", invalid="ignore"):
            new = float(np.float64(golden) * (1 + rel) + shift)
    elif how == "same":
        new = golden
    else:
        new = -golden
    return golden, new


_tolerances = st.tuples(
    st.one_of(st.just(0.0), st.floats(min_value=0, max_value=0.5), st.sampled_from([1e-5, 1.3e-6, 1e-7, 0.25])),
    st.one_of(st.just(0.0), st.floats(min_value=0, max_value=1e-3), st.sampled_from([1e-8, 1e-5, 1e-7])),
)


@settings(max_examples=600, deadline=None)
@given(pair=_golden_and_new(), tol=_tolerances)
def test_within_agrees_with_numpy_isclose_scalars(pair, tol):
    golden, new = pair
    rtol, atol = tol
    if isinstance(new, tuple):
        _, sign, scale = new
        with np.errstate(over="ignore", invalid="ignore"):
            new = float(np.float64(golden) + sign * scale * (atol + rtol * abs(np.float64(golden))))
    got = within(np.array([golden]), np.array([new]), Tolerance(rtol, atol))
    # Reference: numpy.isclose(a, b, rtol, atol, equal_nan=True) tests
    # |a - b| <= atol + rtol * |b| with b the reference (NumPy docs), i.e. b = golden.
    with np.errstate(over="ignore", invalid="ignore"):
        want = np.isclose(new, golden, rtol=rtol, atol=atol, equal_nan=True)
    assert bool(got[0]) == bool(want), (golden, new, rtol, atol)


@settings(max_examples=300, deadline=None)
@given(
    golden=hnp.arrays(np.float64, st.integers(0, 12), elements=st.one_of(_any_float, _moderate)),
    noise=st.floats(min_value=-1e-4, max_value=1e-4),
    tol=_tolerances,
    data=st.data(),
)
def test_within_agrees_with_numpy_isclose_arrays(golden, noise, tol, data):
    with np.errstate(over="ignore", invalid="ignore"):
        new = golden * (1 + noise)
    # replace a few entries with arbitrary floats (incl. NaN and Inf)
    if golden.size:
        k = data.draw(st.integers(0, golden.size - 1))
        new[k] = data.draw(_any_float)
    rtol, atol = tol
    got = within(golden, new, Tolerance(rtol, atol))
    # Reference: numpy.isclose (NumPy docs), golden as the reference argument b.
    with np.errstate(over="ignore", invalid="ignore"):
        want = np.isclose(new, golden, rtol=rtol, atol=atol, equal_nan=True)
    assert got.shape == want.shape
    assert np.array_equal(got, want)


def test_within_known_boundary_cases():
    # NumPy docs' own example: isclose([1e10, 1e-7], [1.00001e10, 1e-8]) -> [True, False]
    # (defaults rtol=1e-5, atol=1e-8), with the second argument as the reference.
    got = within(np.array([1.00001e10, 1e-8]), np.array([1e10, 1e-7]), Tolerance(1e-5, 1e-8))
    assert got.tolist() == [True, False]
    # a run diverging to NaN or Inf is never within tolerance of a finite golden
    big = Tolerance(rtol=0.1, atol=1e3)
    assert within(np.array([1.0, 1.0, 1.0]), np.array([math.nan, math.inf, -math.inf]), big).tolist() == [False] * 3


# -- Parquet golden files --------------------------------------------------------------

STATE_COLUMNS = ["name", "kind", "dtype", "shape", "numel", "sha256", "min", "max", "mean", "l2", "nonfinite", "values",
                 "sketch"]


def _parquet_framing(path):
    # Source: Apache Parquet format specification (parquet-format, "File Format"): a file
    # starts with the 4-byte magic "PAR1" and ends with the 4-byte little-endian footer
    # length followed by "PAR1" again.
    data = path.read_bytes()
    assert data[:4] == b"PAR1"
    assert data[-4:] == b"PAR1"
    footer_len = struct.unpack("<I", data[-8:-4])[0]
    assert 0 < footer_len < len(data) - 12
    return data


def test_golden_files_are_valid_parquet_with_the_documented_columns(tmp_path):
    traj = Trajectory()
    losses = [2.5, 1.25, 0.625, math.nan]
    for step, loss in zip([0, 10, 20, 30], losses):
        traj.log(step, loss=loss)
    traj.log(5, lr=0.01)
    weight = torch.tensor([[1.0, -2.0], [3.0, math.inf]], dtype=torch.float32)
    counts = np.arange(5, dtype=np.int64)
    traj.state(w=weight, counts=counts)
    run = traj.to_run()
    run.meta = {"seed": 7, "reason": "depot check"}
    folder = tmp_path / "golden" / "case"
    trainguard.write_run(folder, run)

    for name in ("metrics.parquet", "state.parquet"):
        _parquet_framing(folder / name)
        pq.ParquetFile(folder / name)  # pyarrow's reader accepts the footer

    metrics = pd.read_parquet(folder / "metrics.parquet")
    assert list(metrics.columns) == ["metric", "step", "value"]
    assert pd.api.types.is_string_dtype(metrics["metric"])
    assert metrics["step"].dtype == np.int64
    assert metrics["value"].dtype == np.float64
    rows = {(r.metric, r.step): r.value for r in metrics.itertuples()}
    assert set(rows) == {("loss", 0), ("loss", 10), ("loss", 20), ("loss", 30), ("lr", 5)}
    assert [rows[("loss", s)] for s in (0, 10, 20)] == losses[:3]
    assert math.isnan(rows[("loss", 30)])
    assert rows[("lr", 5)] == 0.01

    state = pd.read_parquet(folder / "state.parquet")
    assert list(state.columns) == STATE_COLUMNS
    for col in ("name", "kind", "dtype", "sha256"):
        assert pd.api.types.is_string_dtype(state[col]), col
    for col in ("numel", "nonfinite"):
        assert state[col].dtype == np.int64, col
    for col in ("min", "max", "mean", "l2"):
        assert state[col].dtype == np.float64, col
    by_name = state.set_index("name")
    w = by_name.loc["w"]
    assert list(w["shape"]) == [2, 2]
    assert w["numel"] == 4
    assert w["dtype"] == "float32"
    assert w["sha256"] == _struct_sha("f", [1.0, -2.0, 3.0, math.inf])  # struct '<f' + hashlib
    assert (w["min"], w["max"], w["nonfinite"]) == (-2.0, 3.0, 1)
    assert w["l2"] == pytest.approx(math.sqrt(14.0), rel=1e-15)  # hand arithmetic: 1 + 4 + 9
    assert list(w["values"]) == [1.0, -2.0, 3.0, math.inf]
    c = by_name.loc["counts"]
    assert c["dtype"] == "int64"
    assert c["sha256"] == _struct_sha("q", [0, 1, 2, 3, 4])
    assert list(c["values"]) == [0.0, 1.0, 2.0, 3.0, 4.0]

    # and trainguard reads back what it wrote
    back = trainguard.read_run(folder)
    assert back.meta["seed"] == 7 and back.meta["reason"] == "depot check"
    assert back.tensors["w"].sha256 == w["sha256"]
    np.testing.assert_array_equal(back.metrics["loss"].values, np.array(losses))


def test_empty_run_still_writes_valid_parquet(tmp_path):
    trainguard.write_run(tmp_path, Run(metrics={"loss": MetricSeries([], [])}))
    for name in ("metrics.parquet", "state.parquet"):
        _parquet_framing(tmp_path / name)
    assert list(pd.read_parquet(tmp_path / "state.parquet").columns) == STATE_COLUMNS
    assert len(pd.read_parquet(tmp_path / "metrics.parquet")) == 0
