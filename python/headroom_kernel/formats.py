"""headroom_kernel — the number formats of the .npy exchange, to and from NumPy.

bfloat16 travels as its 16-bit patterns ('<u2'), binary16 as NumPy's float16,
int8 as codes with float32 scales and int32 zero points
(docs/external-program.md). Conversions are exact where the target holds the
value, and round to nearest, ties to even, where it does not (IEEE 754-2019
§4.3.1, the rounding headroom's own conversion uses).
"""
import numpy as np

DTYPES = {"float64": "<f8", "float32": "<f4", "binary16": "<f2", "bfloat16": "<u2", "int8": "|i1"}


def bfloat16_to_float32(bits):
    """Returns: float32 values of bfloat16 bit patterns (exact: bfloat16 is float32's top half)."""
    return (np.asarray(bits, dtype=np.uint16).astype(np.uint32) << 16).view(np.float32)


def float32_to_bfloat16(x):
    """Returns: bfloat16 bit patterns ('<u2') of x rounded to nearest, ties to even.

    Adding 0x7FFF plus the lowest kept bit to the float32 pattern and keeping
    the top 16 bits rounds to nearest-even, carrying into the exponent (and to
    infinity past the largest finite bfloat16) as the format requires; a NaN
    keeps its sign and becomes the quiet NaN 0x7FC0. The same construction is
    the common practice of ML runtimes for float32 -> bfloat16.
    """
    u = np.ascontiguousarray(x, dtype=np.float32).view(np.uint32).astype(np.uint64)
    rounded = ((u + 0x7FFF + ((u >> 16) & 1)) >> 16).astype(np.uint16)
    nan = np.isnan(np.asarray(x, dtype=np.float32))
    return np.where(nan, ((u >> 16) & 0x8000).astype(np.uint16) | np.uint16(0x7FC0), rounded).astype("<u2")


def scale_view(scale, granularity, ndim=4):
    """Returns: `scale` ([1], [H], [B, H, T] or [H, D]) shaped to broadcast over [B, H, T, D]."""
    s = np.asarray(scale)
    if granularity == "per_tensor":
        return s.reshape(1, 1, 1, 1)
    if granularity == "per_head":
        return s.reshape(1, -1, 1, 1)
    if granularity == "per_token":
        return s[..., None]
    if granularity == "per_channel":
        return s[None, :, None, :]
    raise ValueError("unknown int8 granularity %r" % granularity)


def dequantize(codes, scale, zero_point, granularity):
    """Returns: (code - zero_point) * scale as float64, exactly.

    The difference needs at most 9 bits and a float32 scale 24, so the product
    fits float64's 53-bit significand: no rounding at all (float32 could not hold it).
    """
    c = np.asarray(codes, dtype=np.float64)
    z = 0.0 if zero_point is None else scale_view(zero_point, granularity).astype(np.float64)
    return (c - z) * scale_view(scale, granularity).astype(np.float64)


def decode(array, fmt):
    """Returns: the values of an input file in format `fmt` as NumPy holds them:
    float64/float32/float16 unchanged, bfloat16 as exact float32."""
    if fmt == "bfloat16":
        return bfloat16_to_float32(array)
    return array


def encode(values, fmt):
    """Returns: `values` (any real array) in the file dtype of output format `fmt`, rounded to nearest-even."""
    v = np.asarray(values)
    if fmt == "float64":
        return v.astype("<f8")
    if fmt == "float32":
        return v.astype("<f4")
    if fmt == "binary16":
        # float64 -> float16 directly: one rounding (a float32 step could round twice).
        return v.astype(np.float64).astype("<f2")
    if fmt == "bfloat16":
        f = v.astype(np.float64)
        f32 = f.astype(np.float32)
        # float64 -> float32 -> bfloat16 rounds twice; exact when the value is a
        # float32 already (a kernel's float32 or bfloat16 result). Otherwise
        # nudge the float32 toward the float64 value's side by its sticky bit.
        inexact = (f32.astype(np.float64) != f) & np.isfinite(f)
        if inexact.any():
            u = f32.view(np.uint32)
            towards_zero = np.abs(f32.astype(np.float64)) > np.abs(f)
            u = np.where(inexact & ((u & 0xFFFF) == 0x8000), np.where(towards_zero, u - 1, u + 1), u)
            f32 = u.astype(np.uint32).view(np.float32)
        return float32_to_bfloat16(f32)
    raise ValueError("no output format %r" % fmt)
