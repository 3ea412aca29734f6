"""`python -m featuretex.demo [--out DIR] [--small]`: generate the demo into DIR (default: the
repository's demo_assets/)."""

from __future__ import annotations

import argparse
import sys
from pathlib import Path

from featuretex.demo import __doc__ as package_doc
from featuretex.demo.assembly import build_demo
from featuretex.demo.bundled import repo_demo_dir
from featuretex.demo.config import DemoConfig


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(prog="python -m featuretex.demo", description=package_doc.split("\n")[0])
    ap.add_argument("--out", type=Path, default=None, help="output folder (default: the repo's demo_assets/)")
    ap.add_argument("--small", action="store_true", help="a tiny, fast variant (for tests)")
    args = ap.parse_args(argv)
    out = args.out or repo_demo_dir()
    cfg = DemoConfig.small() if args.small else DemoConfig()
    manifest = build_demo(out, cfg)
    print(manifest)
    return 0


if __name__ == "__main__":
    sys.exit(main())
