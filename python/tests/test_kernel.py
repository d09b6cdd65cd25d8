"""headroom_kernel.kernel: the declaration, masks, grouped heads, and both protocol modes,
on exchange folders written as docs/external-program.md lays them out."""
import json
import os
import subprocess
import sys
import textwrap

import numpy as np
import pytest

from headroom_kernel import Problem, Unsupported, kernel

PYTHON = "/usr/bin/python3"
HERE = os.path.dirname(os.path.abspath(__file__))


def exchange(folder, mask="none", b=2, hq=4, hkv=2, tq=3, tk=5, d=4, fmt="float32", lse=True):
    """Writes a core problem as headroom would (external_program.cpp's write_exchange)."""
    rng = np.random.default_rng(1)
    shape = {"batch": b, "q_heads": hq, "kv_heads": hkv, "q_len": tq, "kv_len": tk, "key_dim": d, "value_dim": d}
    outputs = {"o": {"file": "o.npy", "dtype": "<f4", "shape": [b, hq, tq, d]}}
    if lse:
        outputs["lse"] = {"file": "lse.npy", "dtype": "<f4", "shape": [b, hq, tq]}
    problem = {"protocol": 2, "kernel": "k", "case": "c", "level": "core", "layout": "BHTD", "shape": shape,
               "scale": 0.5, "scale_hex": "0x1p-1", "mask": {"kind": mask}, "input_format": fmt,
               "output_format": fmt, "inputs": {"q": "q.npy", "k": "k.npy", "v": "v.npy"}, "returns_lse": lse,
               "outputs": outputs}
    for name, heads in (("q", hq), ("k", hkv), ("v", hkv)):
        np.save(os.path.join(folder, name + ".npy"), rng.standard_normal((b, heads, tq if name == "q" else tk, d)).astype("<f4"))
    if mask == "key_padding":
        np.save(os.path.join(folder, "key_lengths.npy"), np.array([2, 0], "<i8"))
        problem["mask"]["file"] = "key_lengths.npy"
    if mask == "bias":
        bias = rng.standard_normal((b, 1, tq, tk)).astype("<f4")
        bias[0, 0, 0, 1] = -np.inf
        np.save(os.path.join(folder, "bias.npy"), bias)
        problem["mask"]["file"] = "bias.npy"
    with open(os.path.join(folder, "problem.json"), "w") as f:
        json.dump(problem, f)
    return Problem(folder)


@pytest.mark.parametrize("kind,rule", [
    ("causal_top_left", lambda b, i, j: j <= i),
    ("causal_bottom_right", lambda b, i, j: j <= i + 5 - 3),
    ("key_padding", lambda b, i, j: j < [2, 0][b]),
])
def test_masks_as_booleans_and_as_bias(tmp_path, kind, rule):
    p = exchange(str(tmp_path), kind)
    seen, add = p.visible(), p.additive()
    for b in range(2):
        for i in range(3):
            for j in range(5):
                assert seen[b, 0, i, j] == rule(b, i, j)
                assert add[b, 0, i, j] == (0 if rule(b, i, j) else -np.inf)


def test_bias_mask_is_the_bias_and_cannot_be_booleans(tmp_path):
    p = exchange(str(tmp_path), "bias")
    assert np.array_equal(p.additive(), p.load("bias.npy"))
    assert not p.visible()[0, 0, 0, 1] and p.visible()[0, 0, 0, 0]
    with pytest.raises(ValueError, match="bias"):
        kernel(name="k", input_format="float32", output_format="float32", masks=["bias"])(lambda q, k, v, scale, mask: q)


def test_grouped_heads_expand_so_query_head_h_sees_kv_head_h_over_group(tmp_path):
    p = exchange(str(tmp_path), lse=False)
    got = {}

    @kernel(name="k", input_format="float32", output_format="float32", expand_groups=True)
    def echo(q, k, v, scale, mask):
        got.update(k=k, scale=scale, mask=mask)
        return v[:, :, :3, :]

    echo.solve(p.folder)
    k = p.load("k.npy")
    for h in range(4):
        assert np.array_equal(got["k"][:, h], k[:, h // 2])
    assert got["scale"] == 0.5 and got["mask"] is None
    assert np.array_equal(np.load(os.path.join(p.folder, "o.npy")), p.load("v.npy")[:, [0, 0, 1, 1], :3, :])


def test_output_of_the_wrong_shape_is_refused(tmp_path):
    p = exchange(str(tmp_path), lse=False)
    k = kernel(name="k", input_format="float32", output_format="float32")(lambda q, k, v, scale, mask: q[:, :, :2])
    with pytest.raises(ValueError, match="shape"):
        k.solve(p.folder)


SCRIPT = textwrap.dedent("""
    import sys
    sys.path.insert(0, %r)
    import numpy as np
    from headroom_kernel import Unsupported, kernel

    @kernel(name="scripted", input_format="float32", output_format="float32", returns_lse=True, expand_groups=True)
    def attend(q, k, v, scale, mask):
        print("chatter on stdout")  # must not reach the protocol channel
        if q.shape[0] == 1:
            raise Unsupported("batch 1")
        if q.shape[0] == 3:
            raise RuntimeError("kernel exploded")
        z = scale * q @ k.swapaxes(-1, -2)
        e = np.exp(z - z.max(-1, keepdims=True))
        return (e / e.sum(-1, keepdims=True)) @ v, np.log(e.sum(-1)) + z.max(-1)

    attend.main()
""") % os.path.join(HERE, "..")


def test_one_shot_mode_describe_run_and_decline(tmp_path):
    script = tmp_path / "k.py"
    script.write_text(SCRIPT)
    d = json.loads(subprocess.run([PYTHON, str(script), "describe"], capture_output=True, text=True, check=True).stdout)
    assert d["protocol"] == 2 and d["serve"] == 1 and d["returns_lse"] is True and d["name"] == "scripted"
    folder = tmp_path / "ok"
    folder.mkdir()
    exchange(str(folder))
    assert subprocess.run([PYTHON, str(script), "run", str(folder)]).returncode == 0
    o, lse = np.load(folder / "o.npy"), np.load(folder / "lse.npy")
    assert o.dtype == np.dtype("<f4") and o.shape == (2, 4, 3, 4) and lse.shape == (2, 4, 3)
    one = tmp_path / "one"
    one.mkdir()
    exchange(str(one), b=1)
    assert subprocess.run([PYTHON, str(script), "run", str(one)]).returncode == 77


def test_serve_mode_answers_many_calls_and_survives_an_exception(tmp_path):
    script = tmp_path / "k.py"
    script.write_text(SCRIPT)
    folders = []
    for i, b in enumerate([2, 1, 3, 2]):
        folder = tmp_path / str(i)
        folder.mkdir()
        exchange(str(folder), b=b)
        folders.append(folder)
    requests = "".join(json.dumps({"call": i + 1, "run": str(f)}) + "\n" for i, f in enumerate(folders))
    done = subprocess.run([PYTHON, str(script), "serve"], input=requests, capture_output=True, text=True, timeout=60)
    lines = [json.loads(line) for line in done.stdout.splitlines()]
    assert lines[0] == {"serve": 1}
    assert [(r["call"], r["status"]) for r in lines[1:]] == [(1, "ok"), (2, "unsupported"), (3, "error"), (4, "ok")]
    assert "RuntimeError: kernel exploded" in lines[3]["detail"]
    assert "chatter on stdout" in done.stderr and "Traceback" in done.stderr
    assert done.returncode == 0
    assert (folders[3] / "o.npy").exists() and not (folders[1] / "o.npy").exists()


def packed_exchange(folder, mask, window=None, softcap=None, sinks=False):
    """A packed variable-length core problem as write_exchange lays it out:
    sequences (Tq, Tk) = (2, 3), (0, 1), (3, 2) packed to Tq 5, Tk 6."""
    p = exchange(folder, mask, b=1, hq=2, hkv=1, tq=5, tk=6)
    j = p.json
    np.save(os.path.join(folder, "cu_q_lens.npy"), np.array([0, 2, 2, 5], "<i8"))
    np.save(os.path.join(folder, "cu_kv_lens.npy"), np.array([0, 3, 4, 6], "<i8"))
    j["varlen"] = {"sequences": 3, "max_q_len": 3, "max_kv_len": 3, "cu_q_lens": "cu_q_lens.npy",
                   "cu_kv_lens": "cu_kv_lens.npy"}
    if window is not None:
        j["mask"]["window"] = window
    if softcap is not None:
        j["softcap"], j["softcap_hex"] = softcap, float.hex(softcap)
    if sinks:
        np.save(os.path.join(folder, "sinks.npy"), np.array([0.5, -2.0], "<f4"))
        j["sinks"] = "sinks.npy"
    with open(os.path.join(folder, "problem.json"), "w") as f:
        json.dump(j, f)
    return Problem(folder)


def test_packed_batches_are_block_diagonal_with_per_sequence_alignment(tmp_path):
    p = packed_exchange(str(tmp_path), "causal_bottom_right")
    seen = p.visible()
    assert seen.shape == (1, 1, 5, 6)
    want = np.zeros((5, 6), bool)
    want[0, 0:2] = True             # sequence 0 (Tq 2, Tk 3): query 0 sees keys 0, 1
    want[1, 0:3] = True
    want[2, 4] = False              # sequence 2 (Tq 3, Tk 2): its first query sees nothing
    want[3, 4] = True
    want[4, 4:6] = True
    assert (seen[0, 0] == want).all()
    assert [list(c) for c in p.cu_lens()] == [[0, 2, 2, 5], [0, 3, 4, 6]]


def test_window_softcap_and_sinks_reach_the_function(tmp_path):
    p = packed_exchange(str(tmp_path), "none", window={"left": 0, "right": 0}, softcap=12.5, sinks=True)
    seen = p.visible()[0, 0]
    # Mask none aligns bottom-right: sequence 0's query i sits at key i + 1.
    assert seen[0].tolist() == [False, True, False, False, False, False]
    assert p.softcap == 12.5
    assert p.sinks().tolist() == [0.5, -2.0]
    got = {}

    @kernel(name="k", input_format="float32", output_format="float32", returns_lse=True,
            features=["varlen", "softcap", "sinks"])
    def attend(q, k, v, scale, mask, softcap, sinks):
        got["softcap"], got["sinks"] = softcap, sinks
        return np.zeros(q.shape[:3] + (v.shape[3],)), np.zeros(q.shape[:3])

    attend.solve(str(tmp_path))
    assert got["softcap"] == 12.5 and got["sinks"].tolist() == [0.5, -2.0]
    assert attend.declaration["features"] == ["varlen", "softcap", "sinks"]


def backward_exchange(folder, mask="none", bias_grad=False, b=2):
    """A backward problem as write_backward_exchange lays it out: the forward's
    folder (batch b, Hq 4 on Hkv 2, Tq 3, Tk 5, D 4) plus o, lse and d_o."""
    p = exchange(folder, mask, b=b)
    rng = np.random.default_rng(2)
    j = p.json
    hq, hkv, tq, tk, d = 4, 2, 3, 5, 4
    for name, shape in (("o", (b, hq, tq, d)), ("lse", (b, hq, tq)), ("d_o", (b, hq, tq, d))):
        np.save(os.path.join(folder, name + ".npy"), rng.standard_normal(shape).astype("<f4"))
        j["inputs"][name] = name + ".npy"
    j["pass"] = "backward"
    del j["returns_lse"]
    j["outputs"] = {"d_q": {"file": "d_q.npy", "dtype": "<f4", "shape": [b, hq, tq, d]},
                    "d_k": {"file": "d_k.npy", "dtype": "<f4", "shape": [b, hkv, tk, d]},
                    "d_v": {"file": "d_v.npy", "dtype": "<f4", "shape": [b, hkv, tk, d]}}
    if bias_grad:
        j["outputs"]["d_bias"] = {"file": "d_bias.npy", "dtype": "<f4", "shape": [b, 1, tq, tk]}
    with open(os.path.join(folder, "problem.json"), "w") as f:
        json.dump(j, f)
    return Problem(folder)


def test_backward_gets_its_inputs_and_sums_expanded_gradients_over_each_group(tmp_path):
    p = backward_exchange(str(tmp_path), "bias", bias_grad=True)
    got = {}

    @kernel(name="k", input_format="float32", output_format="float32", masks=["bias"], mask_as="bias",
            expand_groups=True, returns_lse=True)
    def attend(q, k, v, scale, mask):
        return q

    @attend.backward(bias_grad=True)
    def attend_backward(q, k, v, o, lse, d_o, scale, mask):
        got.update(k=k, o=o, lse=lse, d_o=d_o, scale=scale, mask=mask)
        heads = np.array([1, 2, 4, 8], np.float32)[None, :, None, None]  # query head h weighs 2^h (exact products)
        return q * 2, k * heads, v * heads, np.full(mask.shape, 0.25, np.float32)

    assert attend.declaration["backward"] is True and attend.declaration["backward_flags"] == ["bias_grad"]
    attend.solve_backward(p.folder)
    for name in ("o", "lse", "d_o"):
        assert np.array_equal(got[name], p.load(name + ".npy"))
    assert got["scale"] == 0.5 and np.array_equal(got["mask"], p.additive())
    assert got["k"].shape == (2, 4, 5, 4)  # expanded to the query heads
    k, v = p.load("k.npy"), p.load("v.npy")
    # kv head g serves query heads 2g and 2g + 1: the sum weighs kv head 0 by 1 + 2, kv head 1 by 4 + 8.
    want_k = k * np.array([3, 12], np.float32)[None, :, None, None]
    assert np.array_equal(np.load(os.path.join(p.folder, "d_k.npy")), want_k)
    assert np.array_equal(np.load(os.path.join(p.folder, "d_v.npy")), v * np.array([3, 12], np.float32)[None, :, None, None])
    assert np.array_equal(np.load(os.path.join(p.folder, "d_q.npy")), p.load("q.npy") * 2)
    assert np.load(os.path.join(p.folder, "d_bias.npy")).shape == (2, 1, 3, 5)


def test_backward_declaring_bias_grad_must_return_it_and_take_the_bias(tmp_path):
    p = backward_exchange(str(tmp_path), "bias", bias_grad=True)
    attend = kernel(name="k", input_format="float32", output_format="float32", masks=["bias"], mask_as="bias",
                    returns_lse=True)(lambda q, k, v, scale, mask: q)
    attend.backward(bias_grad=True)(lambda q, k, v, o, lse, d_o, scale, mask: (q, k, v))
    with pytest.raises(ValueError, match="d_bias"):
        attend.solve_backward(p.folder)
    boolean = kernel(name="k", input_format="float32", output_format="float32")(lambda q, k, v, scale, mask: q)
    with pytest.raises(ValueError, match="mask_as"):
        boolean.backward(bias_grad=True)
    with pytest.raises(ValueError, match="no backward"):
        boolean.solve_backward(p.folder)


BACKWARD_SCRIPT = textwrap.dedent("""
    import sys
    sys.path.insert(0, %r)
    import numpy as np
    from headroom_kernel import Unsupported, kernel

    @kernel(name="scripted_backward", input_format="float32", output_format="float32", returns_lse=True)
    def attend(q, k, v, scale, mask):
        return q

    @attend.backward(recomputes=True, nondeterministic=True)
    def attend_backward(q, k, v, o, lse, d_o, scale, mask):
        if q.shape[0] == 1:
            raise Unsupported("batch 1")
        return q + 1, k + 1, v + 1

    attend.main()
""") % os.path.join(HERE, "..")


def test_run_backward_one_shot_and_served(tmp_path):
    script = tmp_path / "k.py"
    script.write_text(BACKWARD_SCRIPT)
    d = json.loads(subprocess.run([PYTHON, str(script), "describe"], capture_output=True, text=True, check=True).stdout)
    assert d["backward"] is True and d["backward_flags"] == ["recomputes", "nondeterministic"]
    one_shot, served, declined = tmp_path / "a", tmp_path / "b", tmp_path / "c"
    for f in (one_shot, served, declined):
        f.mkdir()
    for f in (one_shot, served):
        backward_exchange(str(f))
    backward_exchange(str(declined), b=1)
    assert subprocess.run([PYTHON, str(script), "run-backward", str(one_shot)]).returncode == 0
    assert np.array_equal(np.load(one_shot / "d_k.npy"), np.load(one_shot / "k.npy") + 1)
    requests = (json.dumps({"call": 1, "run-backward": str(served)}) + "\n" +
                json.dumps({"call": 2, "run-backward": str(declined)}) + "\n")
    done = subprocess.run([PYTHON, str(script), "serve"], input=requests, capture_output=True, text=True, timeout=60)
    lines = [json.loads(line) for line in done.stdout.splitlines()]
    assert [(r["call"], r["status"]) for r in lines[1:]] == [(1, "ok"), (2, "unsupported")]
    assert np.array_equal(np.load(served / "d_v.npy"), np.load(served / "v.npy") + 1)
    assert not (served / "d_bias.npy").exists() and not (declined / "d_q.npy").exists()
