"""Run lock: a second run is refused with the holder named; a killed holder frees it."""

import os
import signal
import subprocess
import sys

import pytest

from wearcast._lock import RunLock
from wearcast.exceptions import LockHeldError

HOLDER = """
import sys, time
from wearcast._lock import RunLock
lock = RunLock(sys.argv[1]).acquire()
print("held", flush=True)
time.sleep(60)
"""


def _start_holder(path):
    proc = subprocess.Popen([sys.executable, "-c", HOLDER, str(path)], stdout=subprocess.PIPE, text=True)
    assert proc.stdout.readline().strip() == "held"
    return proc


def test_second_holder_is_refused_with_pid(tmp_path):
    path = tmp_path / "run.lock"
    proc = _start_holder(path)
    try:
        with pytest.raises(LockHeldError) as info:
            RunLock(path).acquire()
        assert f"process {proc.pid}" in str(info.value)
        assert info.value.exit_code == 75
    finally:
        proc.kill()
        proc.wait()


def test_sigkilled_holder_releases_lock(tmp_path):
    path = tmp_path / "run.lock"
    proc = _start_holder(path)
    os.kill(proc.pid, signal.SIGKILL)
    proc.wait()
    with RunLock(path):
        assert path.exists()


def test_lock_is_reentrant_after_release(tmp_path):
    path = tmp_path / "run.lock"
    with RunLock(path):
        pass
    with RunLock(path):
        pass
