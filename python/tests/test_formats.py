"""headroom_kernel.formats against outside references: exact rational arithmetic
(Python's fractions), NumPy's float16 and PyTorch's bfloat16 conversion."""
import fractions
import struct

import numpy as np
import pytest

from headroom_kernel import formats


def nearest_even_bfloat16(x):
    """The bfloat16 nearest to float x, ties to the even pattern, by exact arithmetic (IEEE 754-2019 §4.3.1)."""
    bits = struct.unpack("<I", struct.pack("<f", x))[0]
    low, high = bits >> 16, (bits >> 16) + 1
    def value(b):
        v = float(formats.bfloat16_to_float32(np.array([b], np.uint16))[0])
        # Past the largest finite value, round as if the exponent were unbounded: "infinity" is ±2^128.
        return fractions.Fraction(v) if np.isfinite(v) else fractions.Fraction(2**128 if v > 0 else -(2**128))
    exact = fractions.Fraction(x)
    dl, dh = abs(exact - value(low)), abs(exact - value(high))
    if dl != dh:
        return low if dl < dh else high
    return low if low % 2 == 0 else high


def test_bfloat16_rounds_to_nearest_even_exactly():
    rng = np.random.default_rng(5)
    samples = np.concatenate([
        rng.standard_normal(3000).astype(np.float32) * np.float32(1e3),
        (rng.integers(0, 2**31, 3000, dtype=np.uint32)).view(np.float32),  # any finite pattern
        np.array([1 + 2**-8, 1 + 3 * 2**-8, 1 + 2**-8 + 2**-20, 2**-130, -0.0, 3.3895314e38], np.float32),
    ])
    samples = samples[np.isfinite(samples)]
    got = formats.float32_to_bfloat16(samples)
    for x, g in zip(samples, got):
        want = nearest_even_bfloat16(float(x))
        assert int(g) == want, "%r: got 0x%04x, want 0x%04x" % (float(x), int(g), want)


def test_bfloat16_edges_infinities_and_nan():
    x = np.array([np.inf, -np.inf, np.nan, -np.nan, 3.4028235e38], np.float32)
    got = formats.float32_to_bfloat16(x)
    assert list(got[:2]) == [0x7F80, 0xFF80]
    assert np.isnan(formats.bfloat16_to_float32(got[2:4])).all()
    assert got[4] == 0x7F80  # beyond the largest finite bfloat16 (0x7F7F) by more than half an ulp


def test_bfloat16_agrees_with_torch():
    torch = pytest.importorskip("torch")
    x = np.random.default_rng(6).standard_normal(100000).astype(np.float32) * np.float32(50)
    theirs = torch.from_numpy(x).to(torch.bfloat16).view(torch.int16).numpy().view(np.uint16)
    assert (formats.float32_to_bfloat16(x) == theirs).all()


def test_encode_from_float64_rounds_once():
    # 1 + 2^-8 + 2^-40 lies just above a bfloat16 midpoint; float32 rounds it onto
    # the midpoint and a second rounding would go to even (down): it must go up.
    x = np.array([1 + 2**-8 + 2**-40, -(1 + 2**-8 + 2**-40), 1 + 3 * 2**-8 - 2**-40])
    assert [int(b) for b in formats.encode(x, "bfloat16")] == [0x3F81, 0xBF81, 0x3F81]
    h = formats.encode(np.array([1 + 2**-11 + 2**-40]), "binary16")
    assert h.dtype == np.dtype("<f2") and float(h[0]) == 1 + 2**-10


@pytest.mark.parametrize("granularity,scale_shape", [
    ("per_tensor", (1,)), ("per_head", (3,)), ("per_token", (2, 3, 4)), ("per_channel", (3, 5))])
def test_int8_dequantised_exactly(granularity, scale_shape):
    rng = np.random.default_rng(7)
    codes = rng.integers(-128, 128, (2, 3, 4, 5)).astype(np.int8)
    scale = (rng.random(scale_shape) * 0.1).astype(np.float32)
    zero = rng.integers(-10, 10, scale_shape).astype(np.int32)
    got = formats.dequantize(codes, scale, zero, granularity)
    for b, h, t, d in [(0, 0, 0, 0), (1, 2, 3, 4), (1, 1, 2, 3)]:
        idx = {"per_tensor": (0,), "per_head": (h,), "per_token": (b, h, t), "per_channel": (h, d)}[granularity]
        want = (fractions.Fraction(int(codes[b, h, t, d])) - int(zero[idx])) * fractions.Fraction(float(scale[idx]))
        assert fractions.Fraction(float(got[b, h, t, d])) == want
