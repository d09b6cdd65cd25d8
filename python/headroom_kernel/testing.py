"""headroom_kernel.testing — qualify a kernel from a test suite (pytest, or plain unittest).

    from headroom_kernel.testing import qualify

    def test_my_kernel_qualifies(tmp_path):
        qualify("kernels/my_kernel.py", suite="quick", report_dir=tmp_path)

runs `headroom qualify --kernel-cmd '<python> <script>' --suite <suite>` and
fails the test, when the verdict is not pass, with the run's summary and the
path of its Markdown report.
"""
import json
import os
import shlex
import shutil
import subprocess
import tempfile


class Qualification:
    """A finished run: verdict ("pass"/"fail"), verdict_line ("pass on 4 of 6 block
    cases" ...), record (the JSON result record as a dict), markdown and json
    paths, summary (what headroom printed), exit_code."""

    def __init__(self, **fields):
        self.__dict__.update(fields)


def _fail(message):
    try:
        import pytest
    except ImportError:
        raise AssertionError(message) from None
    pytest.fail(message, pytrace=False)


def find_headroom(headroom=None):
    """Returns: the headroom command: `headroom`, else $HEADROOM, else `headroom` on PATH."""
    found = headroom or os.environ.get("HEADROOM") or shutil.which("headroom")
    if not found:
        raise FileNotFoundError("headroom not found: pass headroom=PATH, set $HEADROOM, or put it on PATH")
    return found


def qualify(kernel_script, suite="quick", budget=None, report_dir=None, python="/usr/bin/python3",
            headroom=None, args=(), timeout=None):
    """Returns: a Qualification when headroom's verdict is pass. Fails the test
    (pytest.fail, else AssertionError) on a fail, with headroom's summary and
    the Markdown report's path, or on bad input (exit 2), with headroom's message.

    kernel_script: the script, optionally followed by its own words
    ("examples/python/torch_core.py bf16"); it runs as `python kernel_script`.
    budget: a budget file (docs/budget-format.md); default: the built-in budgets.
    report_dir: where the JSON and Markdown reports go (default: a fresh temporary folder).
    args: further options for `headroom qualify` (e.g. ["--time-limit", "60"]).
    """
    words = shlex.split(kernel_script) if isinstance(kernel_script, str) else list(kernel_script)
    report_dir = str(report_dir or tempfile.mkdtemp(prefix="headroom-qualify-"))
    os.makedirs(report_dir, exist_ok=True)
    stem = os.path.splitext(os.path.basename(words[0]))[0] + ("-" + "-".join(words[1:]) if words[1:] else "")
    json_path = os.path.join(report_dir, stem + ".json")
    markdown_path = os.path.join(report_dir, stem + ".md")
    command = [find_headroom(headroom), "qualify", "--kernel-cmd", shlex.join([python] + words), "--suite", suite,
               "--json", json_path, "--markdown", markdown_path] + list(args)
    if budget:
        command += ["--budget", str(budget)]
    done = subprocess.run(command, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, timeout=timeout)
    if done.returncode == 2 or not os.path.exists(json_path):
        _fail("headroom could not qualify %s (exit %d): %s" % (kernel_script, done.returncode, done.stderr.strip()))
    with open(json_path) as f:
        record = json.load(f)
    result = Qualification(verdict=record["verdict"], verdict_line=record.get("verdict_line", record["verdict"]),
                           record=record, json=json_path, markdown=markdown_path, summary=done.stdout,
                           exit_code=done.returncode)
    if done.returncode != 0 or record["verdict"] != "pass":
        _fail("headroom: %s %s on suite %s\n%s\nMarkdown report: %s" % (
            kernel_script, result.verdict_line, suite, done.stdout.rstrip(), markdown_path))
    return result
