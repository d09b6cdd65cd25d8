#!/usr/bin/python3
"""A headroom kernel in NumPy, written with the headroom_kernel package (python/).

Textbook attention computed in float32, every mask kind, sliding windows and
packed variable-length batches (the package's mask: block diagonal per
sequence), grouped-query heads expanded by the package, log-sum-exp returned; inputs in the format the first
word names (f32, f16 = binary16, bf16, i8 = int8 per token, dequantised by the
package), output in float32 (i8) or that format. Qualify it with

    headroom qualify --kernel-cmd '/usr/bin/python3 examples/python/numpy_core.py f32' --suite quick
"""
import os
import sys

sys.path.insert(0, os.path.join(os.path.dirname(os.path.abspath(__file__)), "..", "..", "python"))
import numpy as np  # noqa: E402

from headroom_kernel import kernel  # noqa: E402


FORMATS = {"f32": "float32", "f16": "binary16", "bf16": "bfloat16", "i8": "int8"}
variant = sys.argv[1] if len(sys.argv) > 1 and sys.argv[1] in FORMATS else "f32"
fmt = FORMATS[variant]
int8 = {f + "_quant": {"granularity": "per_token", "asymmetric": False} for f in "qkv"} if fmt == "int8" else {}


@kernel(name="numpy_core_" + variant, input_format=fmt, output_format="float32" if fmt == "int8" else fmt,
        masks=["none", "causal_top_left", "causal_bottom_right", "key_padding", "dense", "bias"],
        mask_as="bias", returns_lse=True, expand_groups=True, features=["window", "varlen"], **int8)
def attend(q, k, v, scale, mask):
    """max-shifted softmax in float32, NumPy"""
    q, k, v = (x.astype(np.float32) for x in (q, k, v))
    z = np.float32(scale) * (q @ k.swapaxes(-1, -2))
    if mask is not None:
        z = z + mask
    m = z.max(axis=-1, keepdims=True)
    seen = m > -np.inf  # a row with no visible key gets zeros, as declared
    m = np.where(seen, m, np.float32(0))
    p = np.exp(z - m)
    s = p.sum(axis=-1, keepdims=True)
    with np.errstate(divide="ignore", invalid="ignore"):
        o = np.where(seen, (p @ v) / s, np.float32(0))
        lse = np.where(seen, m + np.log(s), np.float32(-np.inf))[..., 0]
    return o, lse


if __name__ == "__main__":
    attend.main()
