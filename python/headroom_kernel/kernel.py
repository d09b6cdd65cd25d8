"""headroom_kernel — a Python function as a headroom kernel: its declaration and both protocol modes.

    @kernel(name="my_attention", input_format="float32", output_format="float32",
            masks=["none", "causal_top_left", "key_padding"], returns_lse=True)
    def my_attention(q, k, v, scale, mask):
        ...
        return o, lse

    if __name__ == "__main__":
        my_attention.main()

headroom runs `SCRIPT describe`, then `SCRIPT serve` once per run (persistent
mode, docs/external-program.md), or `SCRIPT run DIR` per call with serve=False.
"""
import inspect
import json
import os
import sys
import traceback

import numpy as np

from .problem import Problem, Unsupported, Weights

MASK_KINDS = ("none", "causal_top_left", "causal_bottom_right", "key_padding", "dense", "bias")
SERVE_VERSION = 1  # persistent mode, version 1
EXIT_UNSUPPORTED = 77


class Kernel:
    """A decorated function with its declaration. Call .main() from the script."""

    def __init__(self, fn, name, level, input_format, output_format, masks, masked_row, returns_lse,
                 mask_as, expand_groups, arrays, device, description, serve, extra):
        if mask_as not in ("bool", "bias"):
            raise ValueError("mask_as must be 'bool' or 'bias'")
        if mask_as == "bool" and "bias" in masks:
            raise ValueError("a bias mask cannot be given as booleans: use mask_as='bias' or drop 'bias'")
        unknown = set(masks) - set(MASK_KINDS)
        if unknown:
            raise ValueError("unknown mask kinds %s (use %s)" % (sorted(unknown), ", ".join(MASK_KINDS)))
        if arrays not in ("numpy", "torch"):
            raise ValueError("arrays must be 'numpy' or 'torch'")
        self.fn = fn
        self.mask_as, self.expand_groups, self.arrays, self.device = mask_as, expand_groups, arrays, device
        params = inspect.signature(fn).parameters
        self.takes_problem = "problem" in params
        # Protocol 2 score features, passed to a function that names them.
        self.takes_softcap, self.takes_sinks = "softcap" in params, "sinks" in params
        self.declaration = {
            "protocol": 2,
            "name": name,
            "description": description or (fn.__doc__ or "").strip().split("\n")[0],
            "level": level,
            "input_format": input_format,
            "output_format": output_format,
            "mask_kinds": list(masks),
            "masked_row": masked_row,
            "serve": SERVE_VERSION if serve else 0,
        }
        if level == "core":
            self.declaration["returns_lse"] = bool(returns_lse)
        self.declaration.update(extra)

    def __call__(self, *args, **kwargs):
        return self.fn(*args, **kwargs)

    # ---- one call -------------------------------------------------------

    def _array(self, a, fmt):
        if a is None or self.arrays == "numpy":
            return a
        import torch

        t = torch.from_numpy(np.ascontiguousarray(a))
        if fmt == "bfloat16":
            t = t.to(torch.bfloat16)  # exact: the values are bfloat16 already
        return t.to(self.device)

    def _numpy(self, x):
        if hasattr(x, "detach"):  # a torch tensor
            x = x.detach().to("cpu")
            x = x.float() if x.dtype.is_floating_point and x.element_size() < 4 else x
            return x.numpy()
        return np.asarray(x)

    def solve(self, folder):
        """Runs the function on the problem in `folder` and writes its outputs there.
        Raises Unsupported when the function declines it."""
        p = Problem(folder)
        fmt = p.input_format
        mask = p.visible() if self.mask_as == "bool" else p.additive()
        kwargs = {"scale": p.scale, "mask": self._array(mask, None)}
        if self.takes_problem:
            kwargs["problem"] = p
        if self.takes_softcap:
            kwargs["softcap"] = p.softcap
        if self.takes_sinks:
            kwargs["sinks"] = self._array(p.sinks(), None)
        if p.level == "core":
            q, k, v = p.tensor("q"), p.tensor("k"), p.tensor("v")
            if self.expand_groups:
                group = p.shape["q_heads"] // p.shape["kv_heads"]
                k, v = np.repeat(k, group, axis=1), np.repeat(v, group, axis=1)  # kv head h // group serves q head h
            result = self.fn(self._array(q, fmt), self._array(k, fmt), self._array(v, fmt), **kwargs)
            lse = None
            if isinstance(result, tuple):
                result, lse = result
            p.save("o", self._numpy(result), p.output_format)
            if self.declaration.get("returns_lse"):
                if lse is None:
                    raise ValueError("the kernel declares returns_lse but returned no log-sum-exp")
                p.save("lse", self._numpy(lse), "float32")
        else:
            names = ("w_q", "w_k", "w_v", "w_o", "b_q", "b_k", "b_v", "b_o")
            present = p.json["inputs"]
            w = Weights(**{n: self._array(p.tensor(n), fmt) if n in present else None for n in names})
            x_q = self._array(p.tensor("x_q"), fmt)
            x_kv = self._array(p.tensor("x_kv"), fmt)
            p.save("y", self._numpy(self.fn(x_q, x_kv, w, **kwargs)), p.output_format)

    # ---- the two modes ----------------------------------------------------

    def serve(self, stdin=None, stdout_fd=1):
        """Persistent mode: the ready line, then one reply per request until stdin closes."""
        # Keep the protocol channel to ourselves: anything the kernel prints
        # (Python or C code writing to fd 1) goes to stderr instead.
        channel = os.fdopen(os.dup(stdout_fd), "w", buffering=1)
        os.dup2(2, stdout_fd)
        sys.stdout = sys.stderr
        stdin = stdin if stdin is not None else sys.stdin
        channel.write(json.dumps({"serve": SERVE_VERSION}) + "\n")
        for line in stdin:
            request = json.loads(line)
            reply = {"call": request["call"], "status": "ok"}
            try:
                self.solve(request["run"])
            except Unsupported as e:
                reply = {"call": request["call"], "status": "unsupported", "detail": str(e)}
            except Exception as e:  # the call failed; the process serves on
                traceback.print_exc(file=sys.stderr)
                reply = {"call": request["call"], "status": "error", "detail": "%s: %s" % (type(e).__name__, e)}
            sys.stderr.flush()
            channel.write(json.dumps(reply) + "\n")
        return 0

    def main(self, argv=None):
        """Speaks the protocol named by the last words of argv (default sys.argv):
        `describe`, `run DIR` or `serve`; exits with the protocol's status."""
        argv = list(sys.argv if argv is None else argv)
        if argv and argv[-1] == "describe":
            print(json.dumps(self.declaration))
            sys.exit(0)
        if argv and argv[-1] == "serve":
            sys.exit(self.serve())
        if len(argv) >= 2 and argv[-2] == "run":
            try:
                self.solve(argv[-1])
            except Unsupported:
                sys.exit(EXIT_UNSUPPORTED)
            sys.exit(0)
        print("usage: %s [ARGS] describe | run DIR | serve" % (argv[0] if argv else "kernel"), file=sys.stderr)
        sys.exit(2)


def kernel(name, input_format, output_format, masks=("none",), level="core", masked_row="zeros",
           returns_lse=False, mask_as="bool", expand_groups=False, arrays="numpy", device="cpu",
           description="", serve=True, **extra):
    """Returns: a decorator making a function a headroom kernel.

    core: fn(q, k, v, scale, mask[, problem]) -> o or (o, lse), q [B, Hq, Tq, Dk],
    k, v [B, Hkv, Tk, D] (Hq heads when expand_groups); block:
    fn(x_q, x_kv, w, scale, mask[, problem]) -> y with w a Weights. Arrays are
    NumPy's (arrays="numpy": binary16 as float16, bfloat16 as exact float32, int8
    dequantised to exact float64) or torch tensors on `device` (arrays="torch":
    bfloat16 as torch.bfloat16). mask is None for mask "none", else booleans
    [B, 1|Hq, Tq, Tk] with True = visible (mask_as="bool") or a float32 additive
    bias with -inf where masked (mask_as="bias"). scale is the exact float32
    scale as a Python float. Outputs may be any float array or tensor: they are
    rounded to the output format to nearest, ties to even. Raise Unsupported to
    decline a problem. A function naming `softcap` or `sinks` gets the cap c (a
    float, or None) and the float32 [Hq] sink logits (or None); declare them
    with features=["softcap", "sinks"]. With features=["varlen"] a packed
    variable-length batch arrives as batch 1 with a block-diagonal mask (each
    sequence sees only its own keys); problem.cu_lens() gives the offsets. `extra` holds further declaration fields (max_kv_len,
    key_dims, ...: docs/external-program.md). serve=False: one-shot mode only.
    """

    def wrap(fn):
        return Kernel(fn, name, level, input_format, output_format, masks, masked_row, returns_lse, mask_as,
                      expand_groups, arrays, device, description, serve, extra)

    return wrap
