"""Threads: two demo scans side by side on the `pool` launcher against the same two one after the other.

    python benchmarks/threads.py [--work DIR] [--steps N]

Three batches of the same two demo scans (`featuretex -m scene=demo,demo`), measured one after the
other in this one run, each in a fresh sweep folder:

* sequential - the default (basic) launcher: one scan after the other, each on all cores;
* pool       - `hydra/launcher=pool`: both at once, each sizing its thread pools to its share of
               the cores (featuretex/threads.py);
* pool_all_cores - the same with `fit.threads` set to every core, as each scan sized its pools
               before: shows what the sharing saves.

Target: pool wall time <= 1.1 x sequential. `--steps` shortens every fit alike (default: the
demo's 600). Last printed line: a JSON object.
"""

from __future__ import annotations

import argparse
import json
import os
import shutil
import subprocess
import sys
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]


def batch(work: Path, name: str, steps: int | None, *extra: str) -> float:
    """Wall seconds of `featuretex -m scene=demo,demo` with `extra` overrides; both scans must finish."""
    out = work / name
    shutil.rmtree(out, ignore_errors=True)
    cmd = [sys.executable, "-m", "featuretex.cli", "-m", "scene=demo,demo", f"out={out}", "quiet=true",
           "report=false", *([f"fit.steps={steps}", f"fit.rebake_at={max(0, steps - 100)}"] if steps else []), *extra]
    env = {**os.environ, "PYOPENGL_PLATFORM": "egl"}
    t0 = time.perf_counter()
    r = subprocess.run(cmd, cwd=ROOT, env=env, capture_output=True, text=True)
    wall = time.perf_counter() - t0
    done = [p for p in (out / "0" / "summary.json", out / "1" / "summary.json") if p.is_file()]
    if r.returncode != 0 or len(done) != 2:
        raise SystemExit(f"{name}: batch failed ({r.returncode}):\n{r.stderr[-2000:]}")
    return round(wall, 1)


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--work", type=Path, default=Path("/tmp/featuretex-threads"))
    ap.add_argument("--steps", type=int, default=None)
    args = ap.parse_args()
    args.work.mkdir(parents=True, exist_ok=True)
    cores = len(os.sched_getaffinity(0))
    load0 = os.getloadavg()[0]
    batch(args.work, "warm", 10)        # compiles the numeric kernels once, outside the timings
    seq = batch(args.work, "sequential", args.steps)
    pool = batch(args.work, "pool", args.steps, "hydra/launcher=pool")
    old = batch(args.work, "pool_all_cores", args.steps, "hydra/launcher=pool", f"fit.threads={cores}")
    print(json.dumps({"benchmark": "threads", "cores": cores, "load_avg_1m_at_start": round(load0, 2),
                      "load_avg_1m_at_end": round(os.getloadavg()[0], 2), "steps": args.steps or 600,
                      "sequential_s": seq, "pool_s": pool, "pool_all_cores_s": old,
                      "pool_over_sequential": round(pool / seq, 3),
                      "pool_all_cores_over_sequential": round(old / seq, 3),
                      "target_pool_over_sequential<=1.1": pool / seq <= 1.1}))


if __name__ == "__main__":
    main()
