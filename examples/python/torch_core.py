#!/usr/bin/python3
"""PyTorch attention as a headroom kernel: float32 or bfloat16, every mask, lse.

    headroom qualify --kernel-cmd '/usr/bin/python3 examples/python/torch_core.py f32' --suite quick
    headroom qualify --kernel-cmd '/usr/bin/python3 examples/python/torch_core.py bf16' --suite quick
"""
import os, sys
sys.path.insert(0, os.path.join(os.path.dirname(os.path.abspath(__file__)), "..", "..", "python"))
import torch  # noqa: E402
from headroom_kernel import kernel  # noqa: E402

fmt = {"f32": "float32", "bf16": "bfloat16"}[sys.argv[1]]


@kernel(name="torch_core_" + sys.argv[1], input_format=fmt, output_format=fmt, arrays="torch",
        masks=["none", "causal_top_left", "causal_bottom_right", "key_padding", "dense", "bias"],
        mask_as="bias", returns_lse=True, expand_groups=True)
def attend(q, k, v, scale, mask):
    """torch ops in float32 (bfloat16 inputs widen exactly), the output in the input dtype"""
    z = (q.float() @ k.float().transpose(-1, -2)) * scale
    if mask is not None:
        z = z + mask
    p = torch.softmax(z, dim=-1).nan_to_num(0.0)  # rows with no visible key: zeros, as declared
    return (p @ v.float()).to(q.dtype), torch.logsumexp(z, dim=-1)


if __name__ == "__main__":
    attend.main()
