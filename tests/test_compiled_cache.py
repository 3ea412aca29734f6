"""Where the compiled kernels' machine code is cached: the user's cache folder, a folder of the
user's own in the temporary directory when that cannot be written, no cache when neither can;
never beside an installed package that the user cannot write. Run as an ordinary user
(`setpriv` to `nobody`) against this root-owned checkout, which is the case of a root-owned install."""

from __future__ import annotations

import os
import shutil
import subprocess
import sys
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]


def tempfile_root() -> str:
    import tempfile

    return str(Path(tempfile.gettempdir()).resolve())
# compiles one kernel and scores a render against itself (tolerant PSNR of equal images: the 100 dB cap)
SCORE = """
import sys, tempfile
if len(sys.argv) > 1:
    tempfile.gettempdir = lambda: sys.argv[1]   # as if no temporary folder could be written either
import numpy as np
from featuretex import compiled
from featuretex.scoring.metrics import tolerant_psnr
a = np.random.default_rng(0).random((32, 32, 3))
print(compiled.CACHE_DIR, tolerant_psnr(a, a, np.ones((32, 32), bool)))
"""


def _run(env: dict[str, str], user: bool = False, tmp: str | None = None) -> subprocess.CompletedProcess:
    cmd = [sys.executable, "-c", SCORE, *([tmp] if tmp else [])]
    if user:
        cmd = ["setpriv", "--reuid=65534", "--regid=65534", "--clear-groups", *cmd]
    base = {k: v for k, v in os.environ.items() if not k.startswith(("NUMBA_", "XDG_"))}
    return subprocess.run(cmd, env={**base, **env}, cwd="/", capture_output=True, text=True, timeout=600)


def test_cache_goes_to_the_user_cache_folder(tmp_path):
    r = _run({"XDG_CACHE_HOME": str(tmp_path / "xdg")})
    assert r.returncode == 0, r.stderr
    assert r.stdout.split()[0] == str(tmp_path / "xdg" / "featuretex" / "numba")
    assert list((tmp_path / "xdg" / "featuretex" / "numba").rglob("*.nbi")), "no kernel index cached"


def test_unwritable_cache_folders_fall_back_cleanly(tmp_path):
    # /proc cannot be written, not even by root
    r = _run({"XDG_CACHE_HOME": "/proc/featuretex-none", "TMPDIR": str(tmp_path)})
    assert r.returncode == 0, r.stderr
    assert r.stdout.split()[0] == str(tmp_path / f"featuretex-{os.getuid()}" / "numba")
    r = _run({"XDG_CACHE_HOME": "/proc/featuretex-none"}, tmp="/proc/featuretex-none")
    assert r.returncode == 0 and r.stdout.split() == ["None", "100.0"], r.stderr


@pytest.mark.skipif(os.geteuid() != 0 or shutil.which("setpriv") is None, reason="needs root and setpriv")
def test_ordinary_user_of_a_root_owned_install(tmp_path):
    home = tmp_path / "home"
    home.mkdir()
    os.chown(home, 65534, 65534)
    tmp_path.chmod(0o777)
    for p in tmp_path.parents:       # pytest's folders are private to root; let the user through
        if str(p).startswith(tempfile_root()):
            p.chmod(p.stat().st_mode | 0o011)
    r = _run({"HOME": str(home)}, user=True, tmp="/proc/featuretex-none")
    if "Permission denied" in r.stderr and "python" in r.stderr.lower() and r.returncode != 0 and not r.stdout:
        pytest.skip("the test environment's Python is not readable by another user")
    assert r.returncode == 0, r.stderr[-2000:]
    assert r.stdout.split() == [str(home / ".cache" / "featuretex" / "numba"), "100.0"]
    # without a home: a folder of its own in the temporary folder; with none writable, no cache
    r = _run({"HOME": "/nonexistent", "TMPDIR": str(tmp_path)}, user=True)
    assert r.returncode == 0 and r.stdout.split() == [str(tmp_path / "featuretex-65534" / "numba"), "100.0"], r.stderr
    r = _run({"HOME": "/nonexistent"}, user=True, tmp="/proc/featuretex-none")
    assert r.returncode == 0 and r.stdout.split() == ["None", "100.0"], r.stderr[-2000:]
