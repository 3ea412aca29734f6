"""One featuretex run per run folder at a time.

A run holds an exclusive `flock(2)` on `<run folder>/.featuretex.lock` from before Hydra writes
into the folder until the process ends, and writes its process id, host and start time into that
file. A second run into the same folder cannot take the lock: it stops with one line naming the
holder (exit status 2). The kernel releases a flock when its process ends in any way, so the lock
of a run that was killed (SIGKILL, power loss of a node) is free at once: the next run takes it,
says whose it was, and resumes. On a normal end the lock file is removed.

Within one process the same folder is locked once (the command line locks the run folder, the job
inside it finds it held).
"""

from __future__ import annotations

import fcntl
import json
import logging
import os
import socket
import time
from contextlib import contextmanager
from pathlib import Path
from typing import Iterator

from featuretex.errors import InputError

log = logging.getLogger("featuretex")
LOCK_NAME = ".featuretex.lock"
_HELD: dict[Path, int] = {}   # resolved folder -> open descriptor of its lock file, in this process


class RunFolderBusy(InputError):
    """Another run holds the run folder."""


def _owner() -> dict:
    return {"pid": os.getpid(), "host": socket.gethostname(),
            "started": time.strftime("%Y-%m-%d %H:%M:%S")}


def _read(fd: int) -> dict:
    try:
        os.lseek(fd, 0, os.SEEK_SET)
        info = json.loads(os.read(fd, 4096).decode("utf-8"))
        return info if isinstance(info, dict) else {}
    except (OSError, ValueError):
        return {}


def _describe(info: dict) -> str:
    if not info:
        return "another featuretex run"
    return (f"another featuretex run (PID {info.get('pid', '?')} on host {info.get('host', '?')}, "
            f"started {info.get('started', '?')})")


def acquire(folder: Path) -> int | None:
    """Lock `folder` (which must exist) for this process; None if this process holds it already.
    Raises RunFolderBusy naming the holder."""
    key = Path(folder).resolve()
    if key in _HELD:
        return None
    path = key / LOCK_NAME
    while True:
        fd = os.open(path, os.O_RDWR | os.O_CREAT, 0o644)
        try:
            fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except BlockingIOError:
            holder = _read(fd)
            os.close(fd)
            raise RunFolderBusy(f"run folder '{folder}' is in use by {_describe(holder)}; wait for it to finish, "
                                "or choose another out=") from None
        except BaseException:
            os.close(fd)
            raise
        try:   # the holder before us may have removed the file between our open and our lock
            same = os.fstat(fd).st_ino == os.stat(path).st_ino
        except FileNotFoundError:
            same = False
        if same:
            break
        os.close(fd)
    left = _read(fd)
    if left.get("pid") is not None:
        log.warning("run folder '%s': took over the lock of a run that ended without releasing it (%s)",
                    folder, _describe(left).removeprefix("another featuretex run ").strip("()"))
    data = json.dumps(_owner()).encode()
    os.ftruncate(fd, 0)
    os.pwrite(fd, data, 0)
    _HELD[key] = fd
    return fd


def release(folder: Path) -> None:
    key = Path(folder).resolve()
    fd = _HELD.pop(key, None)
    if fd is None:
        return
    try:
        (key / LOCK_NAME).unlink(missing_ok=True)   # while still locked: a waiter re-checks the inode
    finally:
        os.close(fd)                                # closing the descriptor releases the flock


@contextmanager
def run_folder_lock(folder: Path) -> Iterator[None]:
    """Hold the lock on `folder` for the block (nothing to do if this process holds it already)."""
    fd = acquire(folder)
    try:
        yield
    finally:
        if fd is not None:
            release(folder)
