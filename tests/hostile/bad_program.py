#!/usr/bin/python3
"""headroom tests — an external-program kernel that misbehaves as HEADROOM_HOSTILE_PROGRAM says.

`bad_program.py describe` prints a float32 core declaration (mask "none", no
log-sum-exp); `bad_program.py run DIR` writes DIR/o.npy — or not, as the mode
(read from the environment at each call) decides:

  ok                 the right answer (textbook float32 attention in NumPy)
  wrong_shape        o.npy with one query row too many
  wrong_dtype        o.npy as float64
  truncated          o.npy cut off halfway through its data
  huge_header        o.npy whose header claims 2^40 elements in ~100 bytes
  huge_sparse        o.npy whose header claims 2^38 float32 and a sparse 1 TiB file to match
  fifo               o.npy is a named pipe (a reader that opens it blocks)
  dev_zero           o.npy is a symbolic link to /dev/zero
  nothing            writes nothing and exits 0
  exit_3             exits with status 3
  segfault           kills itself with SIGSEGV
  never_exits        ignores SIGTERM and SIGINT, spins forever
  straggler          the right answer, leaving a grandchild in its own session
                     that holds stdout and stderr open for 3 s
  strays             the right answer, leaving a setsid child and a double-forked
                     grandchild named "hr-stray" sleeping (leave_strays.py; their
                     pids appended to $HEADROOM_HOSTILE_PROGRAM_PIDS when set)
  describe_garbage   `describe` prints something that is not JSON
  describe_huge      `describe` prints JSON with a number beyond double (1e400)
  describe_hangs     `describe` never returns
"""
import json
import os
import signal
import sys
import time

MODE = os.environ.get("HEADROOM_HOSTILE_PROGRAM", "ok")

DECLARATION = {
    "protocol": 1,
    "name": "hostile_program",
    "description": "misbehaves as HEADROOM_HOSTILE_PROGRAM says",
    "level": "core",
    "input_format": "float32",
    "output_format": "float32",
    "mask_kinds": ["none"],
    "masked_row": "zeros",
}


def npy_header(descr, shape):
    """The .npy 1.0 prelude and header for shape (NumPy's format, padded to 64 bytes)."""
    dims = ", ".join(str(n) for n in shape) + ("," if len(shape) == 1 else "")
    text = "{'descr': '%s', 'fortran_order': False, 'shape': (%s), }" % (descr, dims)
    pad = 64 - (10 + len(text) + 1) % 64
    text = text + " " * pad + "\n"
    return b"\x93NUMPY\x01\x00" + len(text).to_bytes(2, "little") + text.encode("ascii")


def attention(folder, problem):
    import numpy as np
    q = np.load(os.path.join(folder, "q.npy"))
    k = np.load(os.path.join(folder, "k.npy"))
    v = np.load(os.path.join(folder, "v.npy"))
    group = problem["shape"]["q_heads"] // problem["shape"]["kv_heads"]
    k = np.repeat(k, group, axis=1)
    v = np.repeat(v, group, axis=1)
    scale = np.float32(float.fromhex(problem["scale_hex"]))
    z = (scale * np.matmul(q, np.swapaxes(k, -1, -2))).astype(np.float32)
    p = np.exp(z - z.max(axis=-1, keepdims=True)).astype(np.float32)
    return (np.matmul(p, v) / p.sum(axis=-1, keepdims=True, dtype=np.float32)).astype(np.float32)


def run(folder):
    with open(os.path.join(folder, "problem.json")) as f:
        problem = json.load(f)
    out = os.path.join(folder, "o.npy")
    s = problem["shape"]
    shape = (s["batch"], s["q_heads"], s["q_len"], s["value_dim"])
    if MODE == "nothing":
        return 0
    if MODE == "exit_3":
        return 3
    if MODE == "segfault":
        os.kill(os.getpid(), signal.SIGSEGV)
    if MODE == "never_exits":
        signal.signal(signal.SIGTERM, signal.SIG_IGN)
        signal.signal(signal.SIGINT, signal.SIG_IGN)
        while True:
            pass
    if MODE == "fifo":
        os.mkfifo(out)
        return 0
    if MODE == "dev_zero":
        os.symlink("/dev/zero", out)
        return 0
    if MODE == "huge_header":
        with open(out, "wb") as f:
            f.write(npy_header("<f4", (1 << 40,)) + b"\0" * 36)
        return 0
    if MODE == "huge_sparse":
        with open(out, "wb") as f:
            head = npy_header("<f4", (1 << 38,))
            f.write(head)
            f.truncate(len(head) + (1 << 40))
        return 0
    import numpy as np
    if MODE == "wrong_shape":
        np.save(out, np.zeros((shape[0], shape[1], shape[2] + 1, shape[3]), dtype=np.float32))
        return 0
    if MODE == "wrong_dtype":
        np.save(out, attention(folder, problem).astype(np.float64))
        return 0
    if MODE == "truncated":
        np.save(out, attention(folder, problem))
        size = os.path.getsize(out)
        with open(out, "r+b") as f:
            f.truncate(size - shape[3] * 2)
        return 0
    if MODE == "straggler" and os.fork() == 0:
        os.setsid()  # out of headroom's process group: the group kill does not reach it
        time.sleep(3)
        os._exit(0)
    np.save(out, attention(folder, problem))
    if MODE == "strays":
        from leave_strays import leave_strays
        leave_strays(os.environ.get("HEADROOM_HOSTILE_PROGRAM_PIDS"))
    return 0


def main(argv):
    if len(argv) == 2 and argv[1] == "describe":
        if MODE == "describe_garbage":
            print("this is not { JSON")
            return 0
        if MODE == "describe_huge":
            print(json.dumps(DECLARATION).replace('"protocol": 1', '"protocol": 1e400'))
            return 0
        if MODE == "describe_hangs":
            while True:
                time.sleep(1)
        print(json.dumps(DECLARATION))
        return 0
    if len(argv) == 3 and argv[1] == "run":
        return run(argv[2])
    print("usage: bad_program.py describe | run DIR", file=sys.stderr)
    return 2


if __name__ == "__main__":
    sys.exit(main(sys.argv))
