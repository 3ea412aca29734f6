"""Settings shared by the compiled (numba) kernels: featuretex.model.mipkernel (texture sampling),
featuretex.fit.photoloss (the training loss) and featuretex.metrics (alignment-tolerant PSNR).

Threading layer "omp": numba's OpenMP pool loads libgomp by the same soname as torch's, so in one
process both run on one OpenMP runtime and their thread teams do not fight for the cores; with
numba's own "workqueue" pool the demo's fit step took 62 ms instead of 44 (measured side by side,
2 threads). NUMBA_THREADING_LAYER in the environment still wins.
"""

from __future__ import annotations

import os

import numba

if "NUMBA_THREADING_LAYER" not in os.environ:
    numba.config.THREADING_LAYER = "omp"


def match_torch_threads(torch_threads: int) -> None:
    """Run the parallel kernels on as many threads as torch uses (the fit fixes that count per run)."""
    numba.set_num_threads(max(1, min(int(torch_threads), numba.config.NUMBA_NUM_THREADS)))
