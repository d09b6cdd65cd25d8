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
    output_format, and (protocol 2, each only for a kernel declaring its
    feature) softcap (the exact float32 cap c, or None), window ({"left": L,
    "right": R}, or None) and varlen (problem.json's "varlen", or None).
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
        self.softcap = float.fromhex(p["softcap_hex"]) if "softcap_hex" in p else None
        self.window = p["mask"].get("window")
        self.varlen = p.get("varlen")

    def sinks(self):
        """Returns: float32 [Hq] sink logits (exp(sinks[h]) joins head h's normaliser
        with no value row), or None when the problem has none."""
        return self.load(self.json["sinks"]).astype(np.float32) if "sinks" in self.json else None

    def cu_lens(self):
        """Returns: (cu_q_lens, cu_kv_lens), int64 [N + 1] offsets of each sequence's
        rows and keys in a packed variable-length batch, or None for a dense one."""
        if self.varlen is None:
            return None
        return self.load(self.varlen["cu_q_lens"]), self.load(self.varlen["cu_kv_lens"])

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

    def _local(self, tq, tk):
        """bool [tq, tk] of mask none or causal with the window, for one (sequence's) problem."""
        i = np.arange(tq)[:, None]
        j = np.arange(tk)[None, :]
        seen = np.ones((tq, tk), bool)
        if self.mask_kind == "causal_top_left":
            seen &= j <= i
        elif self.mask_kind == "causal_bottom_right":
            seen &= j <= i + (tk - tq)
        return seen & self._in_window(tq, tk)

    def _in_window(self, tq, tk):
        """bool [tq, tk]: inside the sliding window (all True without one); the query
        sits at i under causal_top_left and at i + Tk - Tq otherwise."""
        i = np.arange(tq)[:, None]
        j = np.arange(tk)[None, :]
        if self.window is None:
            return np.ones((tq, tk), bool)
        at = i if self.mask_kind == "causal_top_left" else i + (tk - tq)
        left, right = self.window["left"], self.window["right"]
        return ((j >= at - left) if left >= 0 else True) & ((j <= at + right) if right >= 0 else True)

    def visible(self):
        """Returns: bool [B, 1|Hq, Tq, Tk], True where query i may see key j, or None for
        mask none with no window and no variable lengths.

        causal_top_left: j <= i; causal_bottom_right: j <= i + Tk - Tq;
        key_padding: j < key_lengths[b]; dense: the file; bias: where the bias is not -inf;
        and inside the window when there is one. A packed variable-length batch
        (B = 1, Tq and Tk the totals) is block diagonal: each sequence sees only
        its own keys, causal alignment and window on its own lengths.
        """
        s = self.shape
        b, tq, tk = s["batch"], s["q_len"], s["kv_len"]
        kind = self.mask_kind
        if self.varlen is not None:
            cu_q, cu_kv = self.cu_lens()
            seen = np.zeros((1, 1, tq, tk), bool)
            for n in range(len(cu_q) - 1):
                q0, q1, k0, k1 = int(cu_q[n]), int(cu_q[n + 1]), int(cu_kv[n]), int(cu_kv[n + 1])
                seen[0, 0, q0:q1, k0:k1] = self._local(q1 - q0, k1 - k0)
            return seen
        if kind in ("none", "causal_top_left", "causal_bottom_right"):
            if kind == "none" and self.window is None:
                return None
            return np.broadcast_to(self._local(tq, tk), (b, 1, tq, tk)).copy()
        return self._kind_visible() & self._in_window(tq, tk)

    def _kind_visible(self):
        s = self.shape
        b, tq, tk = s["batch"], s["q_len"], s["kv_len"]
        i = np.arange(tq)[:, None]
        j = np.arange(tk)[None, :]
        kind = self.mask_kind
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
        seen = self.visible()
        if seen is None:
            return None
        if self.mask_kind == "bias":
            return np.where(seen, self.load("bias.npy").astype(np.float32), np.float32(-np.inf)).astype(np.float32)
        return np.where(seen, np.float32(0), np.float32(-np.inf)).astype(np.float32)

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
