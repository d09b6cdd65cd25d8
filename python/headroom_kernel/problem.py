"""headroom_kernel — one call's problem, read from its exchange folder (docs/external-program.md)."""
import json
import os

import numpy as np

from . import formats


class Unsupported(Exception):
    """Raise it in a kernel to decline a problem (headroom reports `unsupported`, not a fault)."""


class Weights:
    """The block's projections: w_q, w_k, w_v, w_o and the biases b_q, b_k, b_v, b_o (None when absent)."""

    def __init__(self, **arrays):
        self.__dict__.update(arrays)


class Problem:
    """One call: problem.json's fields plus the inputs, read lazily from the folder.

    Attributes: folder, json (problem.json as a dict), level, shape (dict),
    scale (the exact float32 scale as a Python float), mask_kind, input_format,
    output_format.
    """

    def __init__(self, folder):
        self.folder = folder
        with open(os.path.join(folder, "problem.json")) as f:
            self.json = json.load(f)
        p = self.json
        self.level = p["level"]
        self.shape = p["shape"]
        self.scale = float.fromhex(p["scale_hex"])  # the float32 scale, exactly
        self.mask_kind = p["mask"]["kind"]
        self.input_format = p["input_format"]
        self.output_format = p["output_format"]

    def load(self, name):
        """Returns: the raw array of file `name` (e.g. "q.npy") in the folder."""
        return np.load(os.path.join(self.folder, name), allow_pickle=False)

    def tensor(self, name):
        """Returns: input `name` ("q", "x_q", "w_o", ...) in NumPy's form of the input
        format (bfloat16 as exact float32; int8 dequantised to exact float64)."""
        if self.input_format == "int8":
            quant = self.json["quant"][name]
            zp = self.load(quant["zero_point"]) if quant.get("asymmetric") else None
            return formats.dequantize(self.load(name + ".npy"), self.load(quant["scale"]), zp, quant["granularity"])
        return formats.decode(self.load(name + ".npy"), self.input_format)

    def quantised(self, name):
        """Returns: (codes int8, scale float32, zero_point int32 or None, granularity) of an int8 input."""
        quant = self.json["quant"][name]
        zp = self.load(quant["zero_point"]) if quant.get("asymmetric") else None
        return self.load(name + ".npy"), self.load(quant["scale"]), zp, quant["granularity"]

    def key_lengths(self):
        """Returns: int64 [B] of visible keys per batch entry (mask key_padding), else None."""
        return self.load("key_lengths.npy") if self.mask_kind == "key_padding" else None

    def visible(self):
        """Returns: bool [B, 1|Hq, Tq, Tk], True where query i may see key j, or None for mask none.

        causal_top_left: j <= i; causal_bottom_right: j <= i + Tk - Tq;
        key_padding: j < key_lengths[b]; dense: the file; bias: where the bias is not -inf.
        """
        s = self.shape
        b, tq, tk = s["batch"], s["q_len"], s["kv_len"]
        i = np.arange(tq)[:, None]
        j = np.arange(tk)[None, :]
        kind = self.mask_kind
        if kind == "none":
            return None
        if kind == "causal_top_left":
            return np.broadcast_to(j <= i, (b, 1, tq, tk)).copy()
        if kind == "causal_bottom_right":
            return np.broadcast_to(j <= i + (tk - tq), (b, 1, tq, tk)).copy()
        if kind == "key_padding":
            lengths = self.key_lengths()
            return np.broadcast_to((np.arange(tk)[None, :] < lengths[:, None])[:, None, None, :], (b, 1, tq, tk)).copy()
        if kind == "dense":
            return self.load("mask.npy").astype(bool)
        return self.load("bias.npy") != -np.inf

    def additive(self):
        """Returns: float32 [B, 1|Hq, Tq, Tk] added to the scaled scores (0 where visible,
        -inf where masked, the bias itself for mask bias), or None for mask none."""
        if self.mask_kind == "none":
            return None
        if self.mask_kind == "bias":
            return self.load("bias.npy").astype(np.float32)
        return np.where(self.visible(), np.float32(0), np.float32(-np.inf)).astype(np.float32)

    def output_shapes(self):
        """Returns: {"o": [...], "lse": [...]} (core) or {"y": [...]} (block)."""
        return {name: o["shape"] for name, o in self.json["outputs"].items()}

    def save(self, name, values, fmt):
        """Writes output `name` ("o", "y", "lse") in format `fmt`, checking its shape."""
        want = tuple(self.json["outputs"][name]["shape"])
        array = formats.encode(values, fmt)
        if array.shape != want:
            raise ValueError("%s has shape %s, headroom expects %s" % (name, array.shape, want))
        np.save(os.path.join(self.folder, name + ".npy"), np.ascontiguousarray(array))
