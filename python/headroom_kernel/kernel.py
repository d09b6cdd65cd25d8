"""headroom_kernel — a Python function as a headroom kernel: its declaration and both protocol modes.

    @kernel(name="my_attention", input_format="float32", output_format="float32",
            masks=["none", "causal_top_left", "key_padding"], returns_lse=True)
    def my_attention(q, k, v, scale, mask):
        ...
        return o, lse

    if __name__ == "__main__":
        my_attention.main()

    @my_attention.backward(recomputes=False)
    def my_attention_backward(q, k, v, o, lse, d_o, scale, mask):
        ...
        return d_q, d_k, d_v

headroom runs `SCRIPT describe`, then `SCRIPT serve` once per run (persistent
mode, docs/external-program.md), or `SCRIPT run DIR` (and `SCRIPT run-backward
DIR` for a kernel with a backward) per call with serve=False.
"""
import inspect
import json
import os
import sys
import traceback

import numpy as np

from . import formats
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
        self.backward_fn = None

    def backward(self, recomputes=False, nondeterministic=False, bias_grad=False):
        """Returns: a decorator making a function this kernel's backward (docs/backward.md):
        fn(q, k, v, o, lse, d_o, scale, mask[, problem]) -> (d_q, d_k, d_v) or, with
        bias_grad, (d_q, d_k, d_v, d_bias). q, k, v, mask as for the forward (k, v
        with Hq heads when expand_groups: the d_k, d_v returned for them, [B, Hq,
        Tk, D], are summed over each group here); o [B, Hq, Tq, Dv] in the output
        format, lse float32 [B, Hq, Tq] (-inf or NaN on rows with no visible key),
        d_o [B, Hq, Tq, Dv] in the input format. Declares what kernel_abi.h's
        HR_BACKWARD_* bits say: recomputes (o and lse ignored), nondeterministic
        (judged on spread), bias_grad (d_bias [B, 1|Hq, Tq, Tk] = dS, summed over
        heads when the bias is shared; only asked for with a bias mask, which needs
        mask_as="bias")."""
        if self.declaration["level"] != "core":
            raise ValueError("a backward is judged for core kernels only")
        if bias_grad and self.mask_as != "bias":
            raise ValueError("bias_grad needs mask_as='bias' (the gradient is taken with respect to the bias)")

        def wrap(fn):
            self.backward_fn = fn
            self.takes_problem_backward = "problem" in inspect.signature(fn).parameters
            self.declaration["backward"] = True
            flags = [("recomputes", recomputes), ("nondeterministic", nondeterministic), ("bias_grad", bias_grad)]
            self.declaration["backward_flags"] = [name for name, on in flags if on]
            return fn

        return wrap

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

    def solve_backward(self, folder):
        """Runs the backward function on the backward problem in `folder` and writes
        d_q, d_k, d_v (and d_bias) there. Raises Unsupported when it declines."""
        if self.backward_fn is None:
            raise ValueError("this kernel declares no backward (decorate one with @kernel_object.backward())")
        p = Problem(folder)
        fmt = p.input_format
        mask = p.visible() if self.mask_as == "bool" else p.additive()
        q, k, v = p.tensor("q"), p.tensor("k"), p.tensor("v")
        group = p.shape["q_heads"] // p.shape["kv_heads"]
        if self.expand_groups:
            k, v = np.repeat(k, group, axis=1), np.repeat(v, group, axis=1)
        o = formats.decode(p.load("o.npy"), p.output_format)
        lse = p.load("lse.npy").astype(np.float32)
        d_o = p.tensor("d_o")
        kwargs = {"scale": p.scale, "mask": self._array(mask, None)}
        if self.takes_problem_backward:
            kwargs["problem"] = p
        result = self.backward_fn(self._array(q, fmt), self._array(k, fmt), self._array(v, fmt),
                                  self._array(o, p.output_format), self._array(lse, None), self._array(d_o, fmt),
                                  **kwargs)
        result = tuple(result)
        wants_bias = "d_bias" in p.json["outputs"]
        if len(result) not in (3, 4):
            raise ValueError("a backward returns (d_q, d_k, d_v) or (d_q, d_k, d_v, d_bias), not %d values" % len(result))
        d_q, d_k, d_v = (self._numpy(x) for x in result[:3])
        if self.expand_groups and group > 1:
            # k and v were repeated per query head: their gradients sum over each group.
            def summed(g):
                b, h, t, d = g.shape
                return g.astype(np.float64).reshape(b, h // group, group, t, d).sum(axis=2)
            d_k, d_v = summed(d_k), summed(d_v)
        p.save("d_q", d_q, p.output_format)
        p.save("d_k", d_k, p.output_format)
        p.save("d_v", d_v, p.output_format)
        if wants_bias:
            if len(result) < 4 or result[3] is None:
                raise ValueError("the kernel declares bias_grad but its backward returned no d_bias")
            p.save("d_bias", self._numpy(result[3]), "float32")

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
                if "run-backward" in request:
                    self.solve_backward(request["run-backward"])
                else:
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
        `describe`, `run DIR`, `run-backward DIR` or `serve`; exits with the protocol's status."""
        argv = list(sys.argv if argv is None else argv)
        if argv and argv[-1] == "describe":
            print(json.dumps(self.declaration))
            sys.exit(0)
        if argv and argv[-1] == "serve":
            sys.exit(self.serve())
        if len(argv) >= 2 and argv[-2] in ("run", "run-backward"):
            try:
                (self.solve if argv[-2] == "run" else self.solve_backward)(argv[-1])
            except Unsupported:
                sys.exit(EXIT_UNSUPPORTED)
            sys.exit(0)
        print("usage: %s [ARGS] describe | run DIR | run-backward DIR | serve" % (argv[0] if argv else "kernel"), file=sys.stderr)
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
    A core kernel may add a backward with @the_kernel.backward(...) (Kernel.backward).
    """

    def wrap(fn):
        return Kernel(fn, name, level, input_format, output_format, masks, masked_row, returns_lse, mask_as,
                      expand_groups, arrays, device, description, serve, extra)

    return wrap
