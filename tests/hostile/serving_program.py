#!/usr/bin/python3
"""headroom tests — a persistent-mode kernel program (docs/external-program.md) that misbehaves on cue.

`serving_program.py describe` declares a float32 core kernel (mask "none", no
log-sum-exp) with "serve": 1. `serving_program.py serve` appends its pid to
$HEADROOM_SERVE_LOG, prints the ready line, then answers each request as the
next word of $HEADROOM_SERVE_SCRIPT says (a comma-separated list read in order
across restarts: the count of requests answered so far is the number of lines
in $HEADROOM_SERVE_LOG.calls):

  ok           the right answer (textbook float32 attention in NumPy), reply ok
  crash        kills itself with SIGSEGV before replying
  exit         prints "kernel exploded" on stderr and exits 3
  hang         never replies
  error        replies {"status": "error", "detail": "boom"} and keeps serving
  unsupported  replies unsupported
  garbage      replies with a line that is not JSON
  wrong_call   replies to another call number
  strays       the right answer, leaving a setsid child and a double-forked
               grandchild named "hr-stray" sleeping (leave_strays.py; their
               pids appended to $HEADROOM_SERVE_LOG.strays), reply ok
Before the ready line, $HEADROOM_SERVE_START may say: no_ready (exit 4
without it), bad_ready ({"serve": 9}), slow (sleep 30).
"""
import json
import os
import signal
import sys
import time

import numpy as np

DECLARATION = {
    "protocol": 2, "name": "serving_program", "level": "core", "input_format": "float32",
    "output_format": "float32", "mask_kinds": ["none"], "masked_row": "zeros", "serve": 1,
}


def attention(folder):
    p = json.load(open(os.path.join(folder, "problem.json")))
    q, k, v = (np.load(os.path.join(folder, n + ".npy")).astype(np.float64) for n in "qkv")
    group = q.shape[1] // k.shape[1]
    k, v = np.repeat(k, group, axis=1), np.repeat(v, group, axis=1)
    s = float.fromhex(p["scale_hex"]) * q @ k.transpose(0, 1, 3, 2)
    e = np.exp(s - s.max(axis=-1, keepdims=True))
    np.save(os.path.join(folder, "o.npy"), ((e / e.sum(axis=-1, keepdims=True)) @ v).astype(np.float32))


def reply(obj):
    sys.stdout.write(json.dumps(obj) + "\n")
    sys.stdout.flush()


def serve():
    log = os.environ["HEADROOM_SERVE_LOG"]
    with open(log, "a") as f:
        f.write("%d\n" % os.getpid())
    start = os.environ.get("HEADROOM_SERVE_START", "")
    if start == "no_ready":
        sys.exit(4)
    if start == "slow":
        time.sleep(30)
    reply({"serve": 9 if start == "bad_ready" else 1})
    script = os.environ.get("HEADROOM_SERVE_SCRIPT", "ok").split(",")
    for line in sys.stdin:
        request = json.loads(line)
        with open(log + ".calls", "a+") as f:
            f.seek(0)
            n = len(f.readlines())
            f.write("%d\n" % request["call"])
        mode = script[n] if n < len(script) else "ok"
        if mode == "crash":
            os.kill(os.getpid(), signal.SIGSEGV)
        elif mode == "exit":
            sys.stderr.write("kernel exploded\n")
            sys.exit(3)
        elif mode == "hang":
            time.sleep(60)
        elif mode == "garbage":
            sys.stdout.write("this is not JSON\n")
            sys.stdout.flush()
        elif mode == "wrong_call":
            reply({"call": request["call"] + 1, "status": "ok"})
        elif mode in ("error", "unsupported"):
            reply({"call": request["call"], "status": mode, "detail": "boom"})
        else:
            attention(request["run"])
            if mode == "strays":
                from leave_strays import leave_strays
                leave_strays(log + ".strays")
            reply({"call": request["call"], "status": "ok"})


if __name__ == "__main__":
    if sys.argv[1:] == ["describe"]:
        print(json.dumps(DECLARATION))
    elif sys.argv[1:] == ["serve"]:
        serve()
    else:
        sys.exit(2)
