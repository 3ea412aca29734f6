"""Settings shared by the compiled (numba) kernels: featuretex.model.mipkernel (texture sampling),
featuretex.fit.photoloss (the training loss) and featuretex.scoring.metrics (alignment-tolerant PSNR).
Each of those modules imports this one before it defines a kernel.

Threading layer "omp": numba's OpenMP pool loads libgomp by the same soname as torch's, so in one
process both run on one OpenMP runtime and their thread teams do not fight for the cores (numba's
own "workqueue" pool was measurably slower side by side, benchmarks/fit.py).
NUMBA_THREADING_LAYER in the environment still wins.

Machine-code cache: kernels compile on first use (seconds) and are cached on disk. numba's default
place is `__pycache__` beside the package, which an ordinary user of a root-owned install cannot
write. The cache goes to the user's cache folder instead ($XDG_CACHE_HOME or ~/.cache, then
featuretex/numba), else to a folder of the user's own in the temporary directory; when neither can
be written the kernels are compiled anew in each process (CACHE is False). NUMBA_CACHE_DIR in the
environment still wins.
"""

from __future__ import annotations

import os
import tempfile
from pathlib import Path

import numba

from featuretex.userdirs import user_cache_dir, writable_dir

if "NUMBA_THREADING_LAYER" not in os.environ:
    numba.config.THREADING_LAYER = "omp"


def _choose_cache_dir() -> str | None:
    if os.environ.get("NUMBA_CACHE_DIR"):
        return os.environ["NUMBA_CACHE_DIR"]
    candidates = [user_cache_dir() / "numba", Path(tempfile.gettempdir()) / f"featuretex-{os.getuid()}" / "numba"]
    return next((str(c) for c in candidates if writable_dir(c)), None)


CACHE_DIR = _choose_cache_dir()
CACHE = CACHE_DIR is not None     # kernels pass cache=CACHE to numba.njit
if CACHE_DIR is not None:
    numba.config.CACHE_DIR = CACHE_DIR


def match_torch_threads(torch_threads: int) -> None:
    """Run the parallel kernels on as many threads as torch uses (the fit fixes that count per run)."""
    numba.set_num_threads(max(1, min(int(torch_threads), numba.config.NUMBA_NUM_THREADS)))
