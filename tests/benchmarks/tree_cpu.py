"""CPU seconds and peak RSS of a command's whole process tree (not a test).

Runs the command as a child subreaper (``prctl(PR_SET_CHILD_SUBREAPER)``, Linux): every process
it starts, even one its parent never reaps (the JVM a PySpark driver launches), is reaped here,
so ``RUSAGE_CHILDREN`` afterwards holds the user and system CPU of the whole tree. Prints one JSON
line: wall s, user s, sys s, cpu s (user + sys), the largest single process's peak RSS (MiB) and
the 1-minute load average before and after.

Usage: python tests/benchmarks/tree_cpu.py COMMAND [ARG ...]
"""

from __future__ import annotations

import ctypes
import json
import os
import resource
import subprocess
import sys
import time

PR_SET_CHILD_SUBREAPER = 36


def tree_usage(argv: list[str]) -> dict:
    """Run ``argv``; wait for it and every orphan of its tree; their summed CPU and wall seconds."""
    libc = ctypes.CDLL(None, use_errno=True)
    if libc.prctl(PR_SET_CHILD_SUBREAPER, 1, 0, 0, 0) != 0:
        raise OSError(ctypes.get_errno(), "prctl(PR_SET_CHILD_SUBREAPER) failed")
    load_before = os.getloadavg()[0]
    start = time.perf_counter()
    child = subprocess.Popen(argv)
    status = None
    while True:
        try:
            pid, code, _ = os.wait4(-1, 0)
        except ChildProcessError:
            break
        if pid == child.pid:
            status = os.waitstatus_to_exitcode(code)
    wall = time.perf_counter() - start
    usage = resource.getrusage(resource.RUSAGE_CHILDREN)
    return {"exit": status, "wall_s": round(wall, 2), "user_s": round(usage.ru_utime, 2),
            "sys_s": round(usage.ru_stime, 2), "cpu_s": round(usage.ru_utime + usage.ru_stime, 2),
            "peak_rss_mib": round(usage.ru_maxrss / 1024), "load_before": load_before,
            "load_after": os.getloadavg()[0]}


if __name__ == "__main__":
    print(json.dumps(tree_usage(sys.argv[1:])), file=sys.stderr)
