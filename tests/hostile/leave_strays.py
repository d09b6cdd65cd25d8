"""headroom tests — leaving processes running, as a hostile external program does.

leave_strays(pids_file) starts two processes that sleep on after their starter
exits: one in a session of its own (setsid: a process-group kill misses it)
and one double-forked (its parent exits at once, so it is reparented, and it
too calls setsid, as a daemon does). Each names itself "hr-stray"
(PR_SET_NAME) and, when pids_file is set, appends its pid there. Returns once
both have their name, so a report of them names them.
"""
import ctypes
import os
import time

PR_SET_NAME = 15  # <linux/prctl.h>


def _sleep_on(prctl, ready, pids_file):
    prctl(PR_SET_NAME, b"hr-stray", 0, 0, 0)
    if pids_file:
        with open(pids_file, "a") as f:
            f.write("%d\n" % os.getpid())
    os.write(ready, b"r")
    os.close(ready)
    time.sleep(60)
    os._exit(0)


def leave_strays(pids_file):
    prctl = ctypes.CDLL(None).prctl  # looked up before forking: no loader lock taken in a child
    r, w = os.pipe()
    if os.fork() == 0:
        os.close(r)
        os.setsid()
        _sleep_on(prctl, w, pids_file)
    if os.fork() == 0:
        os.close(r)
        if os.fork() == 0:
            os.setsid()
            _sleep_on(prctl, w, pids_file)
        os._exit(0)
    os.close(w)
    for _ in range(2):
        os.read(r, 1)  # b"" once both are gone, were they to fail: never blocks for ever
    os.close(r)
