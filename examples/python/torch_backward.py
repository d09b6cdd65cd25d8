#!/usr/bin/python3
"""PyTorch attention with its autograd backward as a headroom kernel: float32, every mask,
lse, and dQ, dK, dV (and d(bias)) judged against the certified exact gradient.

    headroom qualify --kernel-cmd '/usr/bin/python3 examples/python/torch_backward.py' --suite quick

The backward recomputes the forward from Q, K, V (it declares `recomputes`:
the O and lse headroom passes are ignored) and lets autograd differentiate it
at the upstream gradient dO; k and v arrive with Hq heads (expand_groups), and
the package sums their gradients over each group.
"""
import os, sys
sys.path.insert(0, os.path.join(os.path.dirname(os.path.abspath(__file__)), "..", "..", "python"))
import torch  # noqa: E402
from headroom_kernel import kernel  # noqa: E402


def scores(q, k, scale, mask):
    """Scaled scores plus the additive mask; rows with no visible key set to 0 (and the
    boolean of those rows), so that neither softmax nor its gradient sees a row of -inf."""
    z = (q @ k.transpose(-1, -2)) * scale
    if mask is None:
        return z, None
    z = z + mask
    empty = torch.isneginf(z).all(dim=-1, keepdim=True)
    return torch.where(empty, torch.zeros_like(z), z), empty


def attention(q, k, v, scale, mask):
    z, empty = scores(q, k, scale, mask)
    p = torch.softmax(z, dim=-1)
    if empty is not None:
        p = torch.where(empty, torch.zeros_like(p), p)  # rows with no visible key: zeros, as declared
    lse = torch.logsumexp(z, dim=-1)
    if empty is not None:
        lse = torch.where(empty[..., 0], torch.full_like(lse, -float("inf")), lse)
    return p @ v, lse


@kernel(name="torch_backward", input_format="float32", output_format="float32", arrays="torch",
        masks=["none", "causal_top_left", "causal_bottom_right", "key_padding", "dense", "bias"],
        mask_as="bias", returns_lse=True, expand_groups=True)
def attend(q, k, v, scale, mask):
    """torch ops in float32; backward by autograd over the recomputed forward"""
    return attention(q, k, v, scale, mask)


@attend.backward(recomputes=True, bias_grad=True)
def attend_backward(q, k, v, o, lse, d_o, scale, mask):
    q, k, v = (t.detach().clone().requires_grad_(True) for t in (q, k, v))
    bias = None if mask is None else mask.detach().clone().requires_grad_(True)
    out, _ = attention(q, k, v, scale, bias)
    out.backward(d_o)
    return q.grad, k.grad, v.grad, None if bias is None else bias.grad


if __name__ == "__main__":
    attend.main()
