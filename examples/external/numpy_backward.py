#!/usr/bin/python3
"""A headroom training kernel as an external program: attention and its backward in NumPy.

headroom runs `numpy_backward.py describe`, `numpy_backward.py run DIR` (the
forward: write DIR/o.npy and DIR/lse.npy) and, because the declaration says
"backward": true, `numpy_backward.py run-backward DIR`: read Q, K, V, the mask,
O, lse and dO from DIR, write DIR/d_q.npy, d_k.npy, d_v.npy (and d_bias.npy
when problem.json lists it). The exchange is docs/external-program.md.
float32 throughout (NumPy's own summation order). The backward uses the O and lse it is given
(Dao et al. 2022, Alg. 4): P = exp(S - lse), D_i = dO_i . O_i,
dS = P (dO V^T - D), dQ = s dS K, dK = s dS^T Q, dV = P^T dO, d(bias) = dS.

    headroom qualify --kernel-cmd "/usr/bin/python3 examples/external/numpy_backward.py"

`numpy_backward.py drop_d` is a flawed variant (D_i left out of dS) that
headroom must fail.
"""
import json
import os
import sys

import numpy as np

from numpy_kernel import visible  # the forward example beside this file: the mask as a boolean array

DECLARATION = {
    "protocol": 2,
    "name": "numpy_backward",
    "description": "attention and its backward in NumPy, float32 throughout",
    "level": "core",
    "input_format": "float32",
    "output_format": "float32",
    "mask_kinds": ["none", "causal_top_left", "causal_bottom_right", "key_padding", "dense", "bias"],
    "masked_row": "zeros",
    "returns_lse": True,
    "backward": True,
    "backward_flags": ["bias_grad"],
}


def load(folder, name):
    return np.load(os.path.join(folder, name)).astype(np.float32)


def scores(folder):
    """The problem, q, k and v (k, v repeated to Hq heads), the scaled scores with the
    bias (-inf where masked), and which entries are visible."""
    with open(os.path.join(folder, "problem.json")) as f:
        problem = json.load(f)
    shape = problem["shape"]
    q, k, v = load(folder, "q.npy"), load(folder, "k.npy"), load(folder, "v.npy")
    group = shape["q_heads"] // shape["kv_heads"]
    k, v = np.repeat(k, group, axis=1), np.repeat(v, group, axis=1)  # kv head g serves q heads g*group...
    scale = np.float32(float.fromhex(problem["scale_hex"]))
    z = scale * np.matmul(q, np.swapaxes(k, -1, -2))
    if problem["mask"]["kind"] == "bias":
        z = z + load(folder, "bias.npy")
    seen = np.broadcast_to(visible(problem, folder, shape), z.shape)
    return problem, q, k, v, scale, np.where(seen, z, np.float32(-np.inf)), seen


def forward(folder):
    _, _, _, v, _, z, seen = scores(folder)
    any_seen = seen.any(axis=-1, keepdims=True)
    m = np.where(any_seen, z.max(axis=-1, keepdims=True), np.float32(0))
    p = np.where(seen, np.exp(z - m), np.float32(0))
    s = np.where(any_seen, p.sum(axis=-1, keepdims=True), np.float32(1))
    o = np.where(any_seen, np.matmul(p / s, v), np.float32(0))
    with np.errstate(divide="ignore"):
        lse = np.where(any_seen, m + np.log(s), np.float32(-np.inf))[..., 0]
    np.save(os.path.join(folder, "o.npy"), o.astype("<f4"))
    np.save(os.path.join(folder, "lse.npy"), lse.astype("<f4"))


def backward(folder, drop_d=False):
    problem, q, k, v, scale, z, seen = scores(folder)
    o, lse, d_o = load(folder, "o.npy"), load(folder, "lse.npy"), load(folder, "d_o.npy")
    shape = problem["shape"]
    # Rows with no visible key have lse -inf (or NaN): their P is all zeros.
    lse = np.where(np.isfinite(lse), lse, np.float32(0))[..., None]
    p = np.where(seen, np.exp(z - lse), np.float32(0))
    d_p = np.matmul(d_o, np.swapaxes(v, -1, -2))
    d = np.float32(0) if drop_d else (d_o * o).sum(axis=-1, keepdims=True)
    d_s = p * (d_p - d)
    d_q = scale * np.matmul(d_s, k)
    group = shape["q_heads"] // shape["kv_heads"]
    per_head_k = scale * np.matmul(np.swapaxes(d_s, -1, -2), q)
    per_head_v = np.matmul(np.swapaxes(p, -1, -2), d_o)
    b, hkv, tk = shape["batch"], shape["kv_heads"], shape["kv_len"]
    d_k = per_head_k.reshape(b, hkv, group, tk, -1).sum(axis=2)  # a kv head's gradient sums over its group
    d_v = per_head_v.reshape(b, hkv, group, tk, -1).sum(axis=2)
    for name, g in (("d_q", d_q), ("d_k", d_k), ("d_v", d_v)):
        np.save(os.path.join(folder, name + ".npy"), g.astype("<f4"))
    if "d_bias" in problem["outputs"]:
        want = problem["outputs"]["d_bias"]["shape"]
        d_bias = d_s.sum(axis=1, keepdims=True) if want[1] == 1 else d_s  # a bias shared by the heads
        np.save(os.path.join(folder, "d_bias.npy"), d_bias.astype("<f4"))


def main(argv):
    words = [w for w in argv[1:] if w != "drop_d"]
    drop_d = "drop_d" in argv[1:]
    if words == ["describe"]:
        d = dict(DECLARATION)
        if drop_d:
            d["name"] = "numpy_backward_drop_d"
        print(json.dumps(d))
        return 0
    if len(words) == 2 and words[0] == "run":
        forward(words[1])
        return 0
    if len(words) == 2 and words[0] == "run-backward":
        backward(words[1], drop_d)
        return 0
    print("usage: numpy_backward.py [drop_d] describe | run DIR | run-backward DIR", file=sys.stderr)
    return 2


if __name__ == "__main__":
    sys.exit(main(sys.argv))
