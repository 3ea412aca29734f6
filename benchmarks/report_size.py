"""The demo report's byte budget: report.html, with the model and everything else inside it, stays
under 12 MB, and what takes the bytes.

    python benchmarks/report_size.py [--run DIR]

Writes the report of a finished demo run folder (default runs/demo; when it holds no summary.json
the demo is run into it first with `featuretex scene=demo`), then prints the page's size, the
largest parts (each section of the page, the inline scripts) and the time the report took. The
last printed line is a JSON object.
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import time
from pathlib import Path

os.environ.setdefault("PYOPENGL_PLATFORM", "egl")

from featuretex.report.html import page_bytes, write_report  # noqa: E402

BUDGET = 12_000_000      # bytes


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--run", type=Path, default=Path("runs/demo"))
    args = ap.parse_args()
    if not (args.run / "summary.json").is_file():
        subprocess.run([sys.executable, "-m", "featuretex.cli", "scene=demo", f"out={args.run}", "quiet=true"],
                       check=True)
    t0 = time.perf_counter()
    page = write_report(args.run)
    seconds = time.perf_counter() - t0
    text = page.read_text(encoding="utf-8")
    size = len(text.encode("utf-8"))
    parts = page_bytes(text)
    for name, n in parts.items():
        print(f"{name:>14} {n / 1e6:7.3f} MB  {100 * n / size:5.1f} %")
    print(f"{'report.html':>14} {size / 1e6:7.3f} MB (budget {BUDGET / 1e6:.0f} MB), written in {seconds:.1f} s")
    print(json.dumps({"bytes": size, "budget_bytes": BUDGET, "within_budget": size < BUDGET,
                      "parts": parts, "report_s": round(seconds, 2)}))
    return 0 if size < BUDGET else 1


if __name__ == "__main__":
    sys.exit(main())
