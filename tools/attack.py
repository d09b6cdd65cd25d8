#!/usr/bin/python3
"""headroom's outside-style attack: malformed inputs, interrupted runs, hostile kernels.

Usage: /usr/bin/python3 tools/attack.py [--build DIR] [--work DIR] [--keep] [--quick] [--parts LIST]

Runs the headroom binary of DIR (default build/, after `cmake --build build`;
build-asan/ to count sanitizer reports as crashes) as an outsider would, and
prints the counts of issue 13's Bar:

  malformed inputs  hand-made broken case folders, manifests, .npy tensors,
                    budgets, records, journals, shapes files, declarations and
                    option values, and special files (/dev/zero, FIFOs,
                    folders, symbolic links, sparse giants) in their place; each
                    must end with exit 2 and one line naming the file (or
                    option), a place and a fix
  interrupted runs  16 runs ended by SIGINT, SIGTERM or SIGKILL after 1 to 40
                    journalled cases (4 of them with an external program in
                    the middle of a call), then resumed: the record must be
                    byte-identical to an uninterrupted run's
  hostile kernels   the plug-ins of tests/hostile/ (exit(), chatter, signal
                    takeovers, scribbling threads, unbounded allocation,
                    forked, setsid and double-forked processes, killing their
                    worker) and tests/hostile/bad_program.py's modes (among
                    them processes left running: a setsid grandchild holding
                    the pipes, a setsid child and a double-forked grandchild);
                    each run must end with a verdict (0 or 1) or, for a broken
                    declaration, exit 2

For every command it counts: hangs (no end within 180 s), crashes (a signal,
an exit status over 128, a sanitizer report), nonsense accepted (exit 0 or 1
on a malformed input), exit-2 messages lacking the file, a place or a fix,
processes left running afterwards (every process whose environment carries
the command's tag, whatever session it moved to; after SIGKILL too), exchange folders left in
the temporary folder, and results lost or damaged. Exit 0 when all are 0.
--quick runs one interruption of each signal instead of 16 (a smoke test).
"""
import argparse
import json
import os
import shutil
import signal
import struct
import subprocess
import sys
import tempfile
import time
import uuid

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
HANG_S = 180


class Attack:
    def __init__(self, build, work):
        self.tool = os.path.join(build, "tools", "headroom")
        self.hostile = os.path.join(build, "tests", "hostile")
        self.work = work
        self.tmp = os.path.join(work, "tmp")  # TMPDIR of every command: exchange folders land here
        os.makedirs(self.tmp, exist_ok=True)
        self.counts = dict(malformed=0, refused_well=0, hangs=0, crashes=0, accepted=0, lacking=0, strays=0,
                           folders=0, lost=0, interrupted=0, identical=0, hostile=0, hostile_ok=0)
        self.findings = []
        self.serial = 0

    # One command, in a session of its own, tagged through its environment.
    def run(self, args, cwd=None, env=None, timeout=HANG_S):
        self.serial += 1
        tag = "%s-%d" % (uuid.uuid4().hex[:12], self.serial)
        e = dict(os.environ, TMPDIR=self.tmp, HEADROOM_ATTACK_TAG=tag)
        e.update(env or {})
        out_path = os.path.join(self.work, "last.out")
        err_path = os.path.join(self.work, "last.err")
        with open(out_path, "wb") as out, open(err_path, "wb") as err:
            p = subprocess.Popen(args, cwd=cwd or self.work, env=e, stdout=out, stderr=err, stdin=subprocess.DEVNULL,
                                 start_new_session=True)
            hung = False
            try:
                p.wait(timeout=timeout)
            except subprocess.TimeoutExpired:
                hung = True
                os.killpg(p.pid, signal.SIGKILL)
                p.wait()
        time.sleep(0.05)
        strays = self.tagged(tag)
        for pid, comm in strays:
            try:
                os.kill(pid, signal.SIGKILL)
            except ProcessLookupError:
                pass
        with open(err_path, "rb") as f:
            err_text = f.read().decode("utf-8", "replace")
        return dict(rc=p.returncode, err=err_text, hung=hung, strays=strays)

    @staticmethod
    def tagged(tag):
        needle = ("HEADROOM_ATTACK_TAG=" + tag).encode() + b"\0"
        found = []
        for d in os.listdir("/proc"):
            if not d.isdigit() or int(d) == os.getpid():
                continue
            try:
                with open("/proc/%s/environ" % d, "rb") as f:
                    if needle in f.read() + b"\0":
                        with open("/proc/%s/comm" % d) as c:
                            found.append((int(d), c.read().strip()))
            except OSError:
                pass
        return found

    def exchange_folders(self):
        return [n for n in os.listdir(self.tmp) if n.startswith("headroom-run-")]

    def note(self, what, r):
        self.finding("%s: exit %s; %s" % (what, r["rc"], r["err"].strip().splitlines()[-1:] or ""))

    def finding(self, text):
        self.findings.append(text)
        print("attack: " + text, flush=True)

    # Shared counting: hang, crash, strays.
    def common(self, what, r):
        bad = False
        if r["hung"]:
            self.counts["hangs"] += 1
            self.finding("HANG " + what)
            bad = True
        elif r["rc"] < 0 or r["rc"] > 128 or "Sanitizer" in r["err"] or "runtime error:" in r["err"]:
            self.counts["crashes"] += 1
            self.note("CRASH " + what, r)
            bad = True
        if r["strays"]:
            self.counts["strays"] += len(r["strays"])
            self.finding("LEFT RUNNING after %s: %s" % (what, r["strays"]))
            bad = True
        left = self.exchange_folders()
        if left:
            self.counts["folders"] += len(left)
            self.finding("EXCHANGE FOLDERS left after %s: %s" % (what, left))
            for n in left:
                shutil.rmtree(os.path.join(self.tmp, n), ignore_errors=True)
            bad = True
        return bad

    # A malformed input: exit 2, one line, naming `names` (the file or option), a place and a fix.
    def malformed(self, what, args, names, cwd=None, env=None):
        self.counts["malformed"] += 1
        r = self.run(args, cwd=cwd, env=env)
        if self.common(what, r):
            return
        if r["rc"] in (0, 1):
            self.counts["accepted"] += 1
            self.note("ACCEPTED " + what, r)
            return
        lines = [l for l in r["err"].splitlines() if l.startswith("headroom")]
        line = lines[-1] if lines else ""
        ok = (r["rc"] == 2 and len(lines) == 1 and "(fix: " in line and names in line and
              line.split("(fix: ")[0].count(": ") >= 2)
        if ok:
            self.counts["refused_well"] += 1
        else:
            self.counts["lacking"] += 1
            self.finding("MESSAGE %s: exit %s, lacks %r, file/place/fix: %r" % (what, r["rc"], names,
                                                                                        r["err"][-300:]))


def replaced(text, old, new):
    """`text` with its first `old` replaced by `new`; `old` must be there (an attack that changes nothing is none)."""
    if old not in text:
        raise AssertionError("attack: %r not found in a fixture" % old)
    return text.replace(old, new, 1)


def write(path, data):
    with open(path, "wb") as f:
        f.write(data if isinstance(data, bytes) else data.encode())


def special_files(a, folder, name):
    """Special files standing where a file named `name` is read: yields (label, path)."""
    os.makedirs(folder, exist_ok=True)
    base = os.path.join(folder, name)
    fifo = base + ".fifo"
    os.mkfifo(fifo)
    directory = base + ".dir"
    os.mkdir(directory)
    link = base + ".zero"
    os.symlink("/dev/zero", link)
    sparse = base + ".sparse"
    with open(sparse, "wb") as f:
        f.truncate(64 << 30)  # 64 GiB of holes
    return [("/dev/zero", "/dev/zero"), ("FIFO", fifo), ("folder", directory), ("symlink to /dev/zero", link),
            ("64 GiB sparse file", sparse)]


def npy_bytes(descr, shape, data, fortran=False):
    header = "{'descr': '%s', 'fortran_order': %s, 'shape': %s, }" % (descr, fortran, shape)
    h = header.encode("latin1")
    pad = (64 - (10 + len(h) + 1) % 64) % 64
    h += b" " * pad + b"\n"
    return b"\x93NUMPY\x01\x00" + struct.pack("<H", len(h)) + h + data


def attack_case_folders(a):
    base = os.path.join(a.work, "case")
    manifest = json.load(open(os.path.join(base, "manifest.json")))
    text = json.dumps(manifest, indent=1)

    def variant(label, edit, names, command="replay"):
        d = os.path.join(a.work, "cases", "c%03d" % a.serial)
        shutil.copytree(base, d, symlinks=True)
        edit(d)
        args = ([a.tool, "replay", "--kernel", "f32_textbook", d, "--json", os.path.join(a.work, "o.json")]
                if command == "replay" else [a.tool, "reference", "--case", d, "--out", os.path.join(a.work, "ref")])
        a.malformed("case folder (%s, %s)" % (label, command), args, names)

    def manifest_edit(m_edit=None, raw=None):
        def edit(d):
            if raw is not None:
                write(os.path.join(d, "manifest.json"), raw)
            else:
                m = json.loads(text)
                m_edit(m)
                write(os.path.join(d, "manifest.json"), json.dumps(m, indent=1))
        return edit

    edits = [
        ("manifest not JSON", manifest_edit(raw="{ not json")),
        ("manifest empty", manifest_edit(raw="")),
        ("manifest a JSON array", manifest_edit(raw="[1, 2]")),
        ("manifest trailing garbage", manifest_edit(raw=text + "\n}}")),
        ("manifest deeply nested", manifest_edit(raw="[" * 100000 + "]" * 100000)),
        ("manifest NUL byte in name", manifest_edit(lambda m: m.update(name="case\u0000x"))),
        ("manifest NUL byte raw", manifest_edit(raw=replaced(text, '"level"', '"le\x00vel"'))),
        ("manifest name ../../etc/passwd", manifest_edit(lambda m: m.update(name="../../etc/passwd"))),
        ("manifest name missing", manifest_edit(lambda m: m.pop("name"))),
        ("manifest version 99", manifest_edit(lambda m: m.update(headroom_case=99))),
        ("manifest level unknown", manifest_edit(lambda m: m.update(level="edge"))),
        ("manifest negative extent", manifest_edit(lambda m: m["shape"].update(kv_len=-3))),
        ("manifest zero extent", manifest_edit(lambda m: m["shape"].update(q_len=0))),
        ("manifest extent 2^62", manifest_edit(lambda m: m["shape"].update(kv_len=2 ** 62))),
        ("manifest extent as string", manifest_edit(lambda m: m["shape"].update(batch="1"))),
        ("manifest extent fractional", manifest_edit(lambda m: m["shape"].update(batch=1.5))),
        ("manifest Hq not a multiple of Hkv", manifest_edit(lambda m: m["shape"].update(q_heads=3, kv_heads=2))),
        ("manifest shape disagrees with tensors", manifest_edit(lambda m: m["shape"].update(key_dim=7))),
        ("manifest scale beyond double", manifest_edit(raw=replaced(text, '"scale": ', '"scale": 1e999, "x": '))),
        ("manifest scale a string", manifest_edit(lambda m: m.update(scale="0.7"))),
        ("manifest scale_hex not hex", manifest_edit(lambda m: m.update(scale_hex="0xZZ"))),
        ("manifest scale_hex disagrees", manifest_edit(lambda m: m.update(scale_hex="0x1p+3"))),
        ("manifest unknown mask kind", manifest_edit(lambda m: m["mask"].update(kind="maybe"))),
        ("manifest unknown source format", manifest_edit(lambda m: m.update(source_format="float24"))),
        ("manifest shape missing", manifest_edit(lambda m: m.pop("shape"))),
        ("manifest 2 MiB name", manifest_edit(lambda m: m.update(name="n" * (2 << 20)))),
    ]
    q = os.path.join(base, "q.npy")
    qdata = open(q, "rb").read()
    outside = os.path.join(a.work, "outside_q.npy")
    shutil.copy(q, outside)

    def tensor(raw=None, action=None, name="q.npy"):
        def edit(d):
            p = os.path.join(d, name)
            if raw is not None:
                write(p, raw)
            else:
                os.remove(p)
                action(p)
        return edit

    edits += [
        ("q.npy truncated", tensor(qdata[: len(qdata) // 2])),
        ("q.npy empty", tensor(b"")),
        ("q.npy wrong magic", tensor(b"\x93NUMPZ" + qdata[6:])),
        ("q.npy header claims 2^40 elements", tensor(npy_bytes("<f4", "(1099511627776,)", b"\0" * 64))),
        ("q.npy product overflows", tensor(npy_bytes("<f4", "(4294967296, 4294967296, 16)", b"\0" * 64))),
        ("q.npy negative dimension", tensor(npy_bytes("<f4", "(-1, 2)", b"\0" * 8))),
        ("q.npy object dtype", tensor(npy_bytes("|O", "(1, 2, 4, 8)", b"\0" * 512))),
        ("q.npy unknown dtype", tensor(npy_bytes("<f3", "(1, 2, 4, 8)", b"\0" * 512))),
        ("q.npy wrong shape", tensor(npy_bytes("<f4", "(1, 2, 4, 9)", b"\0" * 288))),
        ("q.npy header length past the end", tensor(b"\x93NUMPY\x01\x00\xff\xff{'descr'")),
        ("q.npy NUL in header", tensor(npy_bytes("<f4\0", "(1, 2, 4, 8)", b"\0" * 256))),
        ("q.npy a shared library", tensor(open("/usr/lib/x86_64-linux-gnu/libm.so.6", "rb").read()[:65536])),
        ("q.npy missing", tensor(action=lambda p: None)),
        ("q.npy symlink to a valid file outside", tensor(action=lambda p: os.symlink(outside, p))),
        ("q.npy hard link to a file outside", tensor(action=lambda p: os.link(outside, p))),
        ("q.npy symlink to /dev/zero", tensor(action=lambda p: os.symlink("/dev/zero", p))),
        ("q.npy FIFO", tensor(action=lambda p: os.mkfifo(p))),
        ("q.npy folder", tensor(action=lambda p: os.mkdir(p))),
        ("q.npy 64 GiB sparse", tensor(action=lambda p: open(p, "wb").truncate(64 << 30))),
        ("mask.npy wrong dtype", tensor(npy_bytes("<f4", "(1, 2, 4, 5)", b"\0" * 160), name="mask.npy")),
        ("mask.npy missing", tensor(action=lambda p: None, name="mask.npy")),
        ("manifest.json symlink to /dev/zero", tensor(action=lambda p: os.symlink("/dev/zero", p), name="manifest.json")),
        ("manifest.json FIFO", tensor(action=lambda p: os.mkfifo(p), name="manifest.json")),
        ("manifest.json folder", tensor(action=lambda p: os.mkdir(p), name="manifest.json")),
    ]
    # A message may name the manifest, a tensor or the folder: each path holds the folder's.
    for label, edit in edits:
        variant(label, edit, "cases/c")
    # The reference command reads the same folders: a sample of them.
    for label, edit in edits[::4]:
        variant(label, edit, "cases/c", command="reference")


def attack_budgets(a):
    d = os.path.join(a.work, "budgets")
    os.makedirs(d)
    cases = [
        ("not TOML", "version = = 1\n"),
        ("negative limit", "version = 1\n[format.float32]\nmax_scaled_error = -1\n"),
        ("NaN limit", "version = 1\n[format.float32]\nmax_ulp = nan\n"),
        ("infinite limit", "version = 1\n[format.float32]\nmax_ulp = -inf\n"),
        ("number beyond double", "version = 1\n[format.float32]\nmax_ratio_to_plain = 1e999\n"),
        ("integer beyond 64 bits", "version = 1\n[format.float32]\nmax_ulp = 99999999999999999999999\n"),
        ("unknown fault class", "version = 1\n[kernel.f32_textbook]\ntolerated_faults = [\"maybe\"]\n"),
        ("faults not an array", "version = 1\n[kernel.f32_textbook]\ntolerated_faults = \"crash\"\n"),
        ("unknown key", "version = 1\n[format.float32]\nmax_ulps = 4\n"),
        ("unknown format", "version = 1\n[format.float24]\nmax_ulp = 4\n"),
        ("unknown top-level table", "version = 1\n[kernels.x]\nmax_ulp = 4\n"),
        ("version 2", "version = 2\n"),
        ("negative growth exponent", "version = 1\n[format.float32]\nmax_growth_exponent = -1\n"),
        ("lambda 0", "version = 1\n[format.float32]\nmax_scaled_error = { lambda = 0 }\n"),
        ("working_bits 9999", "version = 1\n[format.float32]\nmax_scaled_error = { lambda = 4, working_bits = 9999 }\n"),
        ("limit a string", "version = 1\n[format.float32]\nmax_ulp = \"4\"\n"),
        ("NUL byte", "version = 1\n[kernel.\"f32\x00textbook\"]\nmax_ulp = 4\n"),
        ("duplicated key", "version = 1\n[format.float32]\nmax_ulp = 4\nmax_ulp = 5\n"),
        ("score_bits 0", "version = 1\n[format.float32]\nscore_bits = 0\n"),
        ("2 MiB of comment", "version = 1\n#" + "x" * (2 << 20) + "\n"),
    ]
    for label, text in cases:
        p = os.path.join(d, "b%02d.toml" % a.serial)
        write(p, text)
        a.malformed("budget (%s)" % label, [a.tool, "qualify", "--kernel", "f32_textbook", "--suite", "quick",
                                            "--family", "gaussian", "--budget", p, "--json", os.path.join(a.work, "o.json")],
                    os.path.basename(p))
    for label, p in special_files(a, d, "special_budget.toml"):
        a.malformed("budget (%s)" % label, [a.tool, "qualify", "--kernel", "f32_textbook", "--suite", "quick",
                                            "--family", "gaussian", "--budget", p], p)


def attack_records(a):
    d = os.path.join(a.work, "records")
    os.makedirs(d)
    rec = json.load(open(os.path.join(a.work, "rec.json")))
    text = json.dumps(rec, indent=1)

    def edited(f):
        r = json.loads(text)
        f(r)
        return json.dumps(r, indent=1)

    cases = [
        ("verdict maybe", edited(lambda r: r.update(verdict="maybe"))),
        ("negative limit", edited(lambda r: r["cases"][0].setdefault("limits", {}).update(max_scaled_error=-1.0))),
        ("unknown fault class", edited(lambda r: r["cases"][0].update(faults={"bogus_fault": 1}))),
        ("negative fault count", edited(lambda r: r["cases"][0].update(faults={"crash": -2}))),
        ("case named ../../etc/passwd", edited(lambda r: r["cases"][0].update(name="../../etc/passwd"))),
        ("duplicated case", edited(lambda r: r["cases"].append(r["cases"][0]))),
        ("shard 3/2", edited(lambda r: r.update(shard="3/2"))),
        ("shard 0/0", edited(lambda r: r.update(shard="0/0"))),
        ("NUL byte in kernel", edited(lambda r: r.update(kernel="f32\u0000textbook"))),
        ("number beyond double", replaced(text, '"seed": ', '"x": 1e400, "seed": ')),
        ("schema 99", edited(lambda r: r.update(schema=99))),
        ("kernel missing", edited(lambda r: r.pop("kernel"))),
        ("cases not an array", edited(lambda r: r.update(cases={}))),
        ("seed negative", edited(lambda r: r["cases"][0].update(seed=-1))),
        ("unknown format", edited(lambda r: r.update(input_format="float24"))),
        ("tolerated unknown class", edited(lambda r: r.update(tolerated_faults=["maybe"]))),
        ("truncated", text[: len(text) // 2]),
        ("empty", ""),
        ("not JSON", "verdict: pass\n"),
        ("deeply nested", "[" * 100000 + "]" * 100000),
    ]
    for label, body in cases:
        p = os.path.join(d, "r%03d.json" % a.serial)
        write(p, body)
        a.malformed("record for compare (%s)" % label, [a.tool, "compare", os.path.join(a.work, "rec.json"), p],
                    os.path.basename(p))
        a.malformed("record for merge (%s)" % label, [a.tool, "merge", p, "--json", os.path.join(a.work, "m.json")],
                    os.path.basename(p))
    for label, p in special_files(a, d, "special_record.json"):
        a.malformed("record for compare (%s)" % label, [a.tool, "compare", os.path.join(a.work, "rec.json"), p], p)
        a.malformed("record for merge (%s)" % label, [a.tool, "merge", p, "--json", os.path.join(a.work, "m.json")], p)
    s1 = os.path.join(a.work, "s1.json")
    # The set of records is what is wrong: the message names the argument RECORDS.
    a.malformed("merge of one shard of two", [a.tool, "merge", s1, "--json", os.path.join(a.work, "m.json")], "RECORDS")
    a.malformed("merge of a shard twice", [a.tool, "merge", s1, s1, "--json", os.path.join(a.work, "m.json")],
                "s1.json")


def attack_journals(a):
    d = os.path.join(a.work, "journals")
    os.makedirs(d)
    lines = open(os.path.join(a.work, "journal.jsonl")).read().split("\n")
    head, cases = lines[0], [l for l in lines[1:] if l]
    c0 = json.loads(cases[0])

    def case_line(f):
        c = json.loads(json.dumps(c0))
        f(c)
        return json.dumps(c)

    bodies = [
        ("no header", "\n".join(cases) + "\n"),
        ("header of another run", json.dumps({"journal": "qualify kernel other"}) + "\n" + cases[0] + "\n"),
        ("header not an object", "[\"journal\"]\n" + cases[0] + "\n"),
        ("damaged middle line", head + "\n" + cases[0][:40] + "\n" + cases[1] + "\n"),
        ("duplicated case", head + "\n" + cases[0] + "\n" + cases[0] + "\n"),
        ("case named ../../etc/passwd", head + "\n" + case_line(lambda c: c.update(name="../../etc/passwd")) + "\n"
         + cases[1] + "\n"),
        ("unknown fault class", head + "\n" + case_line(lambda c: c.update(faults={"bogus": 1})) + "\n"
         + cases[1] + "\n"),
        ("NUL byte in a name", head + "\n" + case_line(lambda c: c.update(name="a\u0000b")) + "\n" + cases[1] + "\n"),
        ("number beyond double", head + "\n" + replaced(cases[0], '"seed":', '"x":1e400,"seed":') + "\n"
         + cases[1] + "\n"),
        ("negative limit", head + "\n" + case_line(lambda c: c.setdefault("limits", {}).update(max_ulp=-3.0)) + "\n"
         + cases[1] + "\n"),
        ("deeply nested line", head + "\n" + "[" * 100000 + "]" * 100000 + "\n" + cases[1] + "\n"),
    ]
    for label, body in bodies:
        p = os.path.join(d, "j%03d.jsonl" % a.serial)
        write(p, body)
        a.malformed("journal (%s)" % label, [a.tool, "qualify", "--kernel", "f32_textbook", "--suite", "quick",
                                             "--journal", p, "--resume", "--json", os.path.join(a.work, "o.json")],
                    os.path.basename(p))
    for label, p in special_files(a, d, "special.journal"):
        a.malformed("journal (%s)" % label, [a.tool, "qualify", "--kernel", "f32_textbook", "--suite", "quick",
                                             "--journal", p, "--resume"], p)


def attack_shapes(a):
    d = os.path.join(a.work, "shapes")
    os.makedirs(d)
    good = "[[attention]]\nq_heads = 2\nkv_heads = 1\nhead_dim = 8\ncontext_lengths = [16]\n"
    cases = [
        ("not TOML", "[[attention]\n"),
        ("no attention table", "name = \"x\"\n"),
        ("negative head_dim", good.replace("head_dim = 8", "head_dim = -8")),
        ("zero context", good.replace("[16]", "[0]")),
        ("context beyond limits", good.replace("[16]", "[99999999999999]")),
        ("Hq not a multiple of Hkv", good.replace("q_heads = 2", "q_heads = 3").replace("kv_heads = 1", "kv_heads = 2")),
        ("unknown key", good + "heads = 4\n"),
        ("head_dim a string", good.replace("head_dim = 8", "head_dim = \"8\"")),
        ("number beyond double", good.replace("head_dim = 8", "head_dim = 1e999")),
        ("NUL byte", good.replace("head_dim", "head\x00dim")),
        ("empty context list", good.replace("[16]", "[]")),
    ]
    for label, text in cases:
        p = os.path.join(d, "s%03d.toml" % a.serial)
        write(p, text)
        a.malformed("shapes file (%s)" % label, [a.tool, "qualify", "--kernel", "f32_textbook", "--shapes", p],
                    os.path.basename(p))
    for label, p in special_files(a, d, "special_shapes.toml"):
        a.malformed("shapes file (%s)" % label, [a.tool, "qualify", "--kernel", "f32_textbook", "--shapes", p], p)


def attack_declarations(a):
    d = os.path.join(a.work, "declarations")
    os.makedirs(d)
    good = {"protocol": 2, "name": "k", "level": "core", "input_format": "float32", "output_format": "float32",
            "mask_kinds": ["none"], "masked_row": "zeros", "returns_lse": False}
    program = os.path.join(d, "describe.sh")
    write(program, "#!/bin/sh\n[ \"$2\" = describe ] && exec cat \"$1\"\nexit 9\n")
    cases = [
        ("not JSON", "{ nope"),
        ("empty", ""),
        ("name missing", json.dumps({k: v for k, v in good.items() if k != "name"})),
        ("unknown format", json.dumps(dict(good, input_format="float24"))),
        ("negative max_kv_len", json.dumps(dict(good, max_kv_len=-1))),
        ("max_kv_len beyond double", replaced(json.dumps(dict(good, max_kv_len=1)), "1}", "1e400}")),
        ("unknown masked_row", json.dumps(dict(good, masked_row="maybe"))),
        ("protocol 99", json.dumps(dict(good, protocol=99))),
        ("NUL byte in name", json.dumps(dict(good, name="k\u0000x"))),
        ("name ../../etc/passwd", json.dumps(dict(good, name="../../etc/passwd"))),
        ("mask kinds not a list", json.dumps(dict(good, mask_kinds="none"))),
        ("4 MiB of output", "[" + " " * (4 << 20) + "]"),
    ]
    for label, text in cases:
        p = os.path.join(d, "d%03d.json" % a.serial)
        write(p, text)
        a.malformed("declaration (%s)" % label,
                    [a.tool, "qualify", "--kernel-cmd", "/bin/sh %s %s" % (program, p), "--suite", "quick"], "describe")
    for label, p in [("/dev/zero", "/dev/zero"), ("a folder", d), ("a text file", program)]:
        a.malformed("plug-in (%s)" % label, [a.tool, "qualify", "--kernel", p, "--suite", "quick"], p)
    fifo = os.path.join(d, "plugin.so")
    os.mkfifo(fifo)
    a.malformed("plug-in (FIFO)", [a.tool, "qualify", "--kernel", fifo, "--suite", "quick"], fifo)


def attack_options(a):
    for args, option in [
        (["qualify", "--kernel", "f32_textbook", "--threads", "-1"], "--threads"),
        (["qualify", "--kernel", "f32_textbook", "--threads", "99999999"], "--threads"),
        (["qualify", "--kernel", "f32_textbook", "--time-limit", "1e300"], "--time-limit"),
        (["qualify", "--kernel", "f32_textbook", "--time-limit", "nan"], "--time-limit"),
        (["qualify", "--kernel", "f32_textbook", "--time-limit", "-5"], "--time-limit"),
        (["qualify", "--kernel", "f32_textbook", "--determinism-runs", "0"], "--determinism-runs"),
        (["qualify", "--kernel", "f32_textbook", "--shard", "3/2"], "--shard"),
        (["qualify", "--kernel", "f32_textbook", "--shard", "1/0"], "--shard"),
        (["hunt", "--kernel", "f32_textbook", "--cases", "-1"], "--cases"),
        (["hunt", "--kernel", "f32_textbook", "--seed", "-1"], "--seed"),
        (["hunt", "--kernel", "f32_textbook", "--max-kv-len", "8"], "--max-kv-len"),
        (["hunt", "--kernel", "f32_textbook", "--max-kv-len", "99999999999"], "--max-kv-len"),
        (["reference", "--case", "case", "--out", "ref", "--target-log2", "5000"], "--target-log2"),
        (["compare", "rec.json", "rec.json", "--tolerance", "-1"], "--tolerance"),
        (["case", "make", "--family", "gaussian", "--seed", "1", "--size", "99999", "--out", "x"], "--size"),
        (["case", "make", "--family", "gaussian", "--seed", "1", "--shape", "1,2,1,-4,5,8,8", "--out", "x"], "--shape"),
    ]:
        a.malformed("option %s %s" % (option, args[-1]), [a.tool] + args, option)


def interrupted_runs(a, quick):
    """Runs killed after k journalled cases, then resumed; the record must equal an uninterrupted one."""
    d = os.path.join(a.work, "interrupted")
    os.makedirs(d)
    program = "/usr/bin/python3 " + os.path.join(ROOT, "examples", "external", "numpy_kernel.py")
    # The program runs the gaussian family only: one Python process per call is slow.
    setups = {"bundled": ["--kernel", "f32_textbook", "--suite", "quick"],
              "program": ["--kernel-cmd", program, "--suite", "quick", "--family", "gaussian"]}
    full = {}
    for name, kernel in setups.items():
        out = os.path.join(d, "full-%s.json" % name)
        r = a.run([a.tool, "qualify"] + kernel + ["--json", out, "--quiet"])
        a.common("uninterrupted run (%s)" % name, r)
        full[name] = open(out, "rb").read()
    sigs = [signal.SIGINT, signal.SIGTERM, signal.SIGKILL]
    ks = [1, 2, 4, 7, 10, 14, 19, 25, 31, 37, 40, 45]
    plan = [("bundled", sigs[i % 3], ks[i]) for i in range(12)]
    plan += [("program", sigs[i % 3], [1, 2, 3, 1][i]) for i in range(4)]
    if quick:
        plan = [("bundled", s, 3) for s in sigs] + [("program", signal.SIGTERM, 2)]
    for n, (name, sig, k) in enumerate(plan):
        a.counts["interrupted"] += 1
        out = os.path.join(d, "run%02d.json" % n)
        journal = out + ".journal"
        args = [a.tool, "qualify"] + setups[name] + ["--json", out, "--quiet"]
        tag = "interrupt-%d-%s" % (n, uuid.uuid4().hex[:8])
        env = dict(os.environ, TMPDIR=a.tmp, HEADROOM_ATTACK_TAG=tag)
        p = subprocess.Popen(args, cwd=d, env=env, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL,
                             start_new_session=True)
        start = time.time()
        while p.poll() is None and time.time() - start < HANG_S:
            try:
                with open(journal) as f:
                    if sum(1 for _ in f) - 1 >= k:
                        break
            except OSError:
                pass
            time.sleep(0.002)
        what = "run %d (%s, %s after %d cases)" % (n, name, signal.Signals(sig).name, k)
        if p.poll() is None:
            os.kill(p.pid, sig)  # headroom alone, as a user's kill or Ctrl-C to its process would
        try:
            p.wait(timeout=60)
        except subprocess.TimeoutExpired:
            a.counts["hangs"] += 1
            a.finding("HANG after %s: headroom did not end" % what)
            os.killpg(p.pid, signal.SIGKILL)
            p.wait()
        time.sleep(0.1)
        # SIGKILL included: an external program's supervisor ends it when headroom dies.
        strays = a.tagged(tag)
        if strays:
            a.counts["strays"] += len(strays)
            a.finding("LEFT RUNNING after %s: %s" % (what, strays))
        for pid, _ in strays:
            try:
                os.kill(pid, signal.SIGKILL)
            except ProcessLookupError:
                pass
        left = a.exchange_folders()
        if left and sig != signal.SIGKILL:
            a.counts["folders"] += len(left)
            a.finding("EXCHANGE FOLDERS left after %s: %s" % (what, left))
        # Resume (the next external-program call sweeps a SIGKILLed run's folder).
        r = a.run(args + ["--resume"], cwd=d)
        a.common("resume of " + what, r)
        try:
            same = open(out, "rb").read() == full[name]
        except OSError:
            same = False
        if same:
            a.counts["identical"] += 1
        else:
            a.counts["lost"] += 1
            a.finding("LOST OR DAMAGED: %s resumed to a record unlike the uninterrupted one" % what)


def hostile_run(a, label, kernel, env, time_limit):
    """One run of a hostile kernel: it must end with a verdict (0 or 1) and a readable record."""
    a.counts["hostile"] += 1
    out = os.path.join(a.work, "hostile.json")
    if os.path.exists(out):
        os.remove(out)
    r = a.run([a.tool, "qualify"] + kernel + ["--suite", "quick", "--family", "gaussian", "--time-limit", time_limit,
                                             "--json", out, "--quiet"], env=env)
    bad = a.common("hostile " + label, r)
    if r["rc"] not in (0, 1):
        a.note("HOSTILE %s did not end with a verdict" % label, r)
    elif not bad:
        try:
            json.load(open(out))
            a.counts["hostile_ok"] += 1
        except (OSError, ValueError):
            a.counts["lost"] += 1
            a.finding("LOST OR DAMAGED: no readable record after hostile " + label)


def hostile_kernels(a):
    lib = lambda n: os.path.join(a.hostile, "libhostile_%s.so" % n)
    runs = [("exits", "exits", {}), ("chatter", "chatter", {}), ("threads", "threads", {}), ("greedy", "greedy", {})]
    runs += [("signals " + m, "signals", {"HEADROOM_HOSTILE_SIGNALS": m}) for m in ("hang", "ignore", "swallow")]
    runs += [("forks " + m, "forks", {"HEADROOM_HOSTILE_FORKS": m})
             for m in ("child", "setsid", "double", "waited", "parent")]
    for label, name, env in runs:
        hostile_run(a, "plug-in " + label, ["--kernel", lib(name)], env, "2")
    for mode in ("null_declaration", "null_name", "unterminated_name", "negative_max_kv_len", "level_7",
                 "input_format_99", "masked_row_42", "mask_bits_unknown", "layouts_unknown", "returns_lse_2"):
        p = lib("garbage_declaration")
        a.malformed("plug-in declaration (%s)" % mode, [a.tool, "qualify", "--kernel", p, "--suite", "quick"],
                    os.path.basename(p), env={"HEADROOM_HOSTILE_DECLARATION": mode})
    program = "/usr/bin/python3 " + os.path.join(ROOT, "tests", "hostile", "bad_program.py")
    for mode in ("wrong_shape", "wrong_dtype", "truncated", "huge_header", "huge_sparse", "fifo", "dev_zero",
                 "nothing", "exit_3", "segfault", "never_exits", "straggler", "strays"):
        hostile_run(a, "program " + mode, ["--kernel-cmd", program], {"HEADROOM_HOSTILE_PROGRAM": mode}, "3")
    for mode in ("describe_garbage", "describe_huge", "describe_hangs"):
        a.malformed("program declaration (%s)" % mode, [a.tool, "qualify", "--kernel-cmd", program, "--suite", "quick",
                                                        "--time-limit", "3"], "describe",
                    env={"HEADROOM_HOSTILE_PROGRAM": mode})


def fixtures(a):
    """A valid case, a record, two shard records and a journal header to mutate."""
    w = a.work
    for args in (["case", "make", "--family", "gaussian", "--seed", "1", "--shape", "1,2,1,4,5,8,8", "--mask", "dense",
                  "--out", "case"],
                 ["qualify", "--kernel", "f32_textbook", "--suite", "quick", "--family", "gaussian", "--json", "rec.json"],
                 ["qualify", "--kernel", "f32_textbook", "--suite", "quick", "--shard", "1/2", "--json", "s1.json"]):
        r = a.run([a.tool] + args)
        if r["rc"] not in (0, 1):
            sys.exit("attack: could not make its fixtures: headroom %s: %s" % (" ".join(args), r["err"]))
    # A journal of the quick suite as the journal tests resume it: its identity line, then finished cases.
    journal = os.path.join(w, "journal-run.jsonl")
    p = subprocess.Popen([a.tool, "qualify", "--kernel", "f32_textbook", "--suite", "quick", "--journal", journal,
                          "--json", os.path.join(w, "j.json")], cwd=w, stdout=subprocess.DEVNULL,
                         stderr=subprocess.DEVNULL)
    lines = []
    while p.poll() is None:
        try:
            lines = open(journal).read().split("\n")
        except OSError:
            pass
        if len(lines) > 4:
            p.send_signal(signal.SIGKILL)
            break
        time.sleep(0.002)
    p.wait()
    lines = open(journal).read().split("\n")
    write(os.path.join(w, "journal.jsonl"), "\n".join(lines[:4]) + "\n")


def main():
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--build", default=os.path.join(ROOT, "build"))
    ap.add_argument("--work", default=None, help="folder for the inputs (default: a new temporary folder)")
    ap.add_argument("--keep", action="store_true", help="keep the work folder")
    ap.add_argument("--quick", action="store_true", help="4 interruptions instead of 16")
    ap.add_argument("--parts", default="inputs,hostile,interrupted",
                    help="comma-separated: inputs (malformed inputs), hostile, interrupted (default: all three)")
    opt = ap.parse_args()
    work = opt.work or tempfile.mkdtemp(prefix="headroom-attack-")
    os.makedirs(work, exist_ok=True)
    a = Attack(os.path.abspath(opt.build), os.path.abspath(work))
    start = time.time()
    try:
        parts = opt.parts.split(",")
        fixtures(a)
        if "inputs" in parts:
            for part in (attack_case_folders, attack_budgets, attack_records, attack_journals, attack_shapes,
                         attack_declarations, attack_options):
                part(a)
        if "hostile" in parts:
            hostile_kernels(a)
        if "interrupted" in parts:
            interrupted_runs(a, opt.quick)
    finally:
        if not opt.keep:
            shutil.rmtree(work, ignore_errors=True)
    c = a.counts
    print("attack: %d malformed inputs: %d refused with exit 2 and one line naming file, place and fix; "
          "%d nonsense accepted; %d messages lacking file, place or fix" %
          (c["malformed"], c["refused_well"], c["accepted"], c["lacking"]))
    print("attack: %d hostile kernel runs (plug-ins and external programs) ended with a readable verdict: %d" %
          (c["hostile"], c["hostile_ok"]))
    print("attack: %d interrupted runs, %d byte-identical after --resume" % (c["interrupted"], c["identical"]))
    print("attack: hangs %d, crashes %d, processes left running %d, exchange folders left %d, "
          "results lost or damaged %d (%.0f s)" %
          (c["hangs"], c["crashes"], c["strays"], c["folders"], c["lost"], time.time() - start))
    clean = (c["hangs"] + c["crashes"] + c["accepted"] + c["lacking"] + c["strays"] + c["folders"] + c["lost"] == 0
             and c["identical"] == c["interrupted"] and c["hostile_ok"] == c["hostile"])
    return 0 if clean else 1


if __name__ == "__main__":
    sys.exit(main())
