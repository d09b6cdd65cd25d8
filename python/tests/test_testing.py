"""headroom_kernel.testing.qualify against the real headroom ($HEADROOM, set by CTest)."""
import os
import re
import textwrap

import pytest

from headroom_kernel.testing import find_headroom, qualify

ROOT = os.path.join(os.path.dirname(os.path.abspath(__file__)), "..", "..")

try:
    HEADROOM = find_headroom()
except FileNotFoundError:
    HEADROOM = None
needs_headroom = pytest.mark.skipif(HEADROOM is None, reason="set $HEADROOM to the headroom binary (CTest does)")


@needs_headroom
def test_a_sound_kernel_passes_and_returns_the_record(tmp_path):
    q = qualify(os.path.join(ROOT, "examples/python/numpy_core.py"), suite="quick", report_dir=tmp_path,
                args=["--shard", "1/6"])
    assert q.verdict == "pass" and q.exit_code == 0
    assert q.record["kernel"] == "numpy_core_f32" and len(q.record["cases"]) > 0
    assert os.path.exists(q.markdown) and "PASS" in open(q.markdown).read()


@needs_headroom
def test_a_wrong_kernel_fails_the_test_with_the_summary_and_the_markdown_path(tmp_path):
    script = tmp_path / "wrong_scale.py"
    script.write_text(textwrap.dedent("""
        import sys
        sys.path.insert(0, %r)
        import numpy as np
        from headroom_kernel import kernel

        @kernel(name="wrong_scale", input_format="float32", output_format="float32", expand_groups=True)
        def attend(q, k, v, scale, mask):
            z = q @ k.swapaxes(-1, -2)  # forgets the scale
            e = np.exp(z - z.max(-1, keepdims=True))
            return (e / e.sum(-1, keepdims=True)) @ v

        attend.main()
    """) % os.path.join(ROOT, "python"))
    with pytest.raises(pytest.fail.Exception) as failed:
        qualify(str(script), suite="quick", report_dir=tmp_path / "reports", args=["--shard", "1/6"])
    message = str(failed.value)
    # The verdict line, then headroom's own summary (its header names the kernel and the verdict).
    assert re.search(r"wrong_scale\.py fail( on \d+ of \d+ core cases)? on suite quick", message), message
    assert "headroom wrong_scale (float32 → float32), suite quick" in message
    md = message.rsplit("Markdown report: ", 1)[1].strip()
    assert os.path.exists(md) and "FAIL" in open(md).read()


@needs_headroom
def test_bad_input_fails_with_headrooms_message(tmp_path):
    with pytest.raises(pytest.fail.Exception, match="exit 2"):
        qualify(os.path.join(ROOT, "examples/python/numpy_core.py"), suite="nonesuch", report_dir=tmp_path)


@needs_headroom
def test_a_backward_is_judged_through_run_backward_and_a_flawed_one_fails(tmp_path):
    program = os.path.join(ROOT, "examples/external/numpy_backward.py")
    # The masks family (its kinds by turns); a quarter of it keeps the one-shot program's many starts quick.
    cases = ["--family", "masks", "--shard", "1/4"]
    q = qualify(program, suite="quick", report_dir=tmp_path / "sound", args=cases)
    judged = [c for c in q.record["cases"] if "backward" in c]
    assert judged, "no case had its gradients judged"
    for c in judged:  # both ways (the forward returns lse), every tensor within the case's limit
        for way, limit in (("fed_exact", "max_gradient_scaled_error"),
                           ("end_to_end", "max_gradient_scaled_error_end_to_end")):
            for g in ("d_q", "d_k", "d_v"):
                assert float(c["backward"][way][g]["max_scaled_error"]) <= float(c["limits"][limit]), (c["name"], way, g)
    with pytest.raises(pytest.fail.Exception) as failed:
        qualify(program + " drop_d", suite="quick", report_dir=tmp_path / "flawed", args=cases)
    assert "numpy_backward_drop_d" in str(failed.value)
    md = str(failed.value).rsplit("Markdown report: ", 1)[1].strip()
    assert "max_gradient_scaled_error" in open(md).read()
