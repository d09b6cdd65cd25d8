#!/usr/bin/python3
"""A headroom kernel as an external program: textbook float32 attention in NumPy.

headroom runs `numpy_kernel.py describe` (print the declaration as JSON) and
`numpy_kernel.py run DIR` (read DIR/problem.json and the .npy inputs, write
DIR/o.npy and DIR/lse.npy). The exchange is described in docs/external-program.md.
Run it with /usr/bin/python3 (Debian's, which has NumPy):

    headroom qualify --kernel-cmd "/usr/bin/python3 examples/external/numpy_kernel.py"
"""
import json
import os
import sys

import numpy as np

DECLARATION = {
    "protocol": 1,
    "name": "numpy_textbook",
    "description": "textbook float32 attention in NumPy: max-shifted softmax",
    "level": "core",
    "input_format": "float32",
    "output_format": "float32",
    "mask_kinds": ["none", "causal_top_left", "causal_bottom_right", "key_padding", "dense", "bias"],
    "masked_row": "zeros",
    "returns_lse": True,
}


def visible(problem, folder, shape):
    """Boolean [B, 1|Hq, Tq, Tk] of the keys each query may see."""
    b, tq, tk = shape["batch"], shape["q_len"], shape["kv_len"]
    mask = problem["mask"]
    kind = mask["kind"]
    i = np.arange(tq)[:, None]
    j = np.arange(tk)[None, :]
    if kind == "none":
        return np.ones((b, 1, tq, tk), dtype=bool)
    if kind == "causal_top_left":
        return np.broadcast_to(j <= i, (b, 1, tq, tk))
    if kind == "causal_bottom_right":
        return np.broadcast_to(j <= i + (tk - tq), (b, 1, tq, tk))
    data = np.load(os.path.join(folder, mask["file"]))
    if kind == "key_padding":
        return (np.arange(tk)[None, :] < data[:, None])[:, None, None, :].repeat(tq, axis=2)
    if kind == "dense":
        return data
    return data != -np.inf  # bias


def run(folder):
    with open(os.path.join(folder, "problem.json")) as f:
        problem = json.load(f)
    shape = problem["shape"]
    q = np.load(os.path.join(folder, "q.npy"))
    k = np.load(os.path.join(folder, "k.npy"))
    v = np.load(os.path.join(folder, "v.npy"))
    group = shape["q_heads"] // shape["kv_heads"]
    k = np.repeat(k, group, axis=1)  # key/value head g serves query heads g*group ... g*group+group-1
    v = np.repeat(v, group, axis=1)
    scale = np.float32(float.fromhex(problem["scale_hex"]))
    z = scale * np.matmul(q, np.swapaxes(k, -1, -2))
    if problem["mask"]["kind"] == "bias":
        z = z + np.load(os.path.join(folder, "bias.npy"))
    seen = np.broadcast_to(visible(problem, folder, shape), z.shape)
    z = np.where(seen, z, np.float32(-np.inf)).astype(np.float32)
    m = z.max(axis=-1, keepdims=True)
    any_seen = seen.any(axis=-1, keepdims=True)
    safe_m = np.where(any_seen, m, np.float32(0))
    p = np.where(seen, np.exp(z - safe_m), np.float32(0)).astype(np.float32)
    s = p.sum(axis=-1, keepdims=True, dtype=np.float32)
    o = np.matmul(p, v) / np.where(any_seen, s, np.float32(1))
    o = np.where(any_seen, o, np.float32(0)).astype(np.float32)
    with np.errstate(divide="ignore"):
        lse = np.where(any_seen, safe_m + np.log(s), np.float32(-np.inf))[..., 0].astype(np.float32)
    np.save(os.path.join(folder, "o.npy"), o)
    np.save(os.path.join(folder, "lse.npy"), lse)


def main(argv):
    if len(argv) == 2 and argv[1] == "describe":
        print(json.dumps(DECLARATION))
        return 0
    if len(argv) == 3 and argv[1] == "run":
        run(argv[2])
        return 0
    print("usage: numpy_kernel.py describe | run DIR", file=sys.stderr)
    return 2


if __name__ == "__main__":
    sys.exit(main(sys.argv))
