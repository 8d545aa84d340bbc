"""Worker processes never outlive the program that started them (no orphans after a crash)."""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import time

import pytest

SCRIPT = r"""
import os, sys, time
from tempofield.engine.processes import process_pool

def main():
    pool = process_pool(2)
    pids = pool.submit(os.getpid).result(), pool.submit(os.getpid).result()
    print(" ".join(str(p) for p in set(pids) | set(pool._processes)), flush=True)
    time.sleep(120)  # killed by the test long before

if __name__ == "__main__":
    main()
"""


def _alive(pid: int) -> bool:
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    try:  # a zombie waiting for its (gone) parent counts as ended
        with open(f"/proc/{pid}/stat") as f:
            return f.read().split(")")[-1].split()[0] != "Z"
    except OSError:
        return False


@pytest.mark.skipif(sys.platform != "linux", reason="reads /proc")
def test_workers_end_when_their_parent_is_killed(tmp_path):
    script = tmp_path / "crashing_program.py"
    script.write_text(SCRIPT)
    proc = subprocess.Popen([sys.executable, str(script)], stdout=subprocess.PIPE, text=True)
    try:
        line = proc.stdout.readline()
        workers = [int(p) for p in line.split()]
        assert workers and all(_alive(p) for p in workers)
        os.kill(proc.pid, signal.SIGKILL)  # a crash: no atexit, no pool shutdown
        proc.wait(timeout=10)
        deadline = time.monotonic() + 10
        while time.monotonic() < deadline and any(_alive(p) for p in workers):
            time.sleep(0.1)
        assert not any(_alive(p) for p in workers), "worker processes outlived their parent"
    finally:
        if proc.poll() is None:
            proc.kill()
