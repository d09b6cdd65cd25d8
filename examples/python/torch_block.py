#!/usr/bin/python3
"""torch.nn.MultiheadAttention as a headroom block kernel (float32).

It takes blocks with Hkv = Hq, Dk = Dv and Dm = Hq·Dk and declines the rest,
so its verdict says how many block cases it took:

    headroom qualify --kernel-cmd '/usr/bin/python3 examples/python/torch_block.py' --suite quick
"""
import os, sys
sys.path.insert(0, os.path.join(os.path.dirname(os.path.abspath(__file__)), "..", "..", "python"))
import torch  # noqa: E402
from headroom_kernel import Unsupported, kernel  # noqa: E402


@kernel(name="torch_mha", level="block", input_format="float32", output_format="float32", arrays="torch",
        masks=["none", "causal_top_left", "causal_bottom_right", "key_padding", "dense"], masked_row="nan")
def block(x_q, x_kv, w, scale, mask, problem):
    """torch.nn.MultiheadAttention, batch_first, weights loaded from the case"""
    s = problem.shape
    if s["kv_heads"] != s["q_heads"] or s["key_dim"] != s["value_dim"] or s["model_dim"] != s["q_heads"] * s["key_dim"]:
        raise Unsupported("MultiheadAttention needs Hkv = Hq, Dk = Dv and Dm = Hq*Dk")
    if abs(scale * s["key_dim"] ** 0.5 - 1) > 1e-6:
        raise Unsupported("MultiheadAttention scales scores by 1/sqrt(Dk) only")
    mha = torch.nn.MultiheadAttention(s["model_dim"], s["q_heads"], bias=w.b_q is not None, batch_first=True)
    with torch.no_grad():  # headroom's weights are [in, out]; torch's are [out, in]
        mha.in_proj_weight.copy_(torch.cat([w.w_q, w.w_k, w.w_v], dim=1).T)
        mha.out_proj.weight.copy_(w.w_o.T)
        if w.b_q is not None:
            mha.in_proj_bias.copy_(torch.cat([w.b_q, w.b_k, w.b_v]))
            mha.out_proj.bias.copy_(w.b_o)
        attn_mask = None if mask is None else ~mask.expand(-1, s["q_heads"], -1, -1).flatten(0, 1)
        return mha(x_q, x_kv, x_kv, attn_mask=attn_mask, need_weights=False)[0]


if __name__ == "__main__":
    block.main()
