#!/usr/bin/python3
"""A headroom kernel in NumPy, written with the headroom_kernel package (python/).

Textbook float32 attention, every mask kind, grouped-query heads expanded by
the package, log-sum-exp returned. Qualify it with

    headroom qualify --kernel-cmd '/usr/bin/python3 examples/python/numpy_core.py' --suite quick
"""
import os
import sys

sys.path.insert(0, os.path.join(os.path.dirname(os.path.abspath(__file__)), "..", "..", "python"))
import numpy as np  # noqa: E402

from headroom_kernel import kernel  # noqa: E402


@kernel(name="numpy_core_f32", input_format="float32", output_format="float32", mask_as="bias",
        masks=["none", "causal_top_left", "causal_bottom_right", "key_padding", "dense", "bias"],
        returns_lse=True, expand_groups=True)
def attend(q, k, v, scale, mask):
    """max-shifted softmax in float32, NumPy"""
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
