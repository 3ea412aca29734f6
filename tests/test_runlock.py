"""The run folder lock, between real processes: a holder is named, a killed holder's lock is taken
over, a finished run leaves no lock file. Reference: flock(2) semantics (a lock belongs to an open
file description and is released when its process ends, however it ends)."""

from __future__ import annotations

import logging
import os
import signal
import socket
import subprocess
import sys
import time
from pathlib import Path

import pytest

from featuretex.runlock import LOCK_NAME, RunFolderBusy, acquire, release, run_folder_lock

HOLD = """
import sys, time
from pathlib import Path
from featuretex.runlock import acquire
acquire(Path(sys.argv[1]))
print("held", flush=True)
time.sleep(600)
"""


def _holder(folder: Path) -> subprocess.Popen:
    p = subprocess.Popen([sys.executable, "-c", HOLD, str(folder)], stdout=subprocess.PIPE, text=True)
    assert p.stdout is not None and p.stdout.readline().strip() == "held"
    return p


def test_a_held_folder_names_its_holder_and_a_killed_holder_is_taken_over(tmp_path, caplog):
    p = _holder(tmp_path)
    try:
        with pytest.raises(RunFolderBusy) as e:
            acquire(tmp_path)
        msg = str(e.value)
        assert f"PID {p.pid} on host {socket.gethostname()}" in msg and str(tmp_path) in msg and "\n" not in msg
    finally:
        p.send_signal(signal.SIGKILL)
        p.wait()
    assert (tmp_path / LOCK_NAME).exists()        # left behind by the killed holder
    with caplog.at_level(logging.WARNING, logger="featuretex"):
        with run_folder_lock(tmp_path):
            assert f"PID {os.getpid()}" not in caplog.text and f"PID {p.pid}" in caplog.text
            with run_folder_lock(tmp_path):        # the same process again: nothing to do
                pass
            assert (tmp_path / LOCK_NAME).exists()
    assert not (tmp_path / LOCK_NAME).exists()     # a finished run removes its lock


def test_release_then_a_new_holder(tmp_path):
    acquire(tmp_path)
    release(tmp_path)
    p = _holder(tmp_path)
    try:
        with pytest.raises(RunFolderBusy, match=f"PID {p.pid}"):
            acquire(tmp_path)
    finally:
        p.kill()
        p.wait()
    t = time.monotonic()
    acquire(tmp_path)
    release(tmp_path)
    assert time.monotonic() - t < 5
