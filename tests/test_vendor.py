"""The three.js the report carries is the pinned npm release, unmodified: rebuilding the bundle
from node_modules (package.json pins three and esbuild exactly) gives the committed file byte for
byte, and the licence travels inside it."""

from __future__ import annotations

import json
import shutil
import subprocess
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]
VENDOR = ROOT / "featuretex" / "report" / "vendor"


def test_vendor_versions_are_the_pinned_ones():
    pinned = json.loads((ROOT / "package.json").read_text())["devDependencies"]
    recorded = json.loads((VENDOR / "VERSIONS.json").read_text())
    assert recorded["three"] == pinned["three"] and recorded["esbuild"] == pinned["esbuild"]
    bundle = (VENDOR / "three.bundle.js").read_text(encoding="utf-8")
    licence = (VENDOR / "LICENSE-three.txt").read_text(encoding="utf-8").strip()
    assert bundle.startswith(f"/* three.js {recorded['three']} ") and licence in bundle


@pytest.mark.skipif(shutil.which("node") is None or not (ROOT / "node_modules" / "three").is_dir()
                    or not (ROOT / "node_modules" / "esbuild").is_dir(),
                    reason="node and `npm install` needed to rebuild the bundle")
def test_bundle_rebuilds_from_the_pinned_packages(tmp_path):
    installed = json.loads((ROOT / "node_modules" / "three" / "package.json").read_text())["version"]
    assert installed == json.loads((ROOT / "package.json").read_text())["devDependencies"]["three"]
    subprocess.run(["node", str(VENDOR / "build.mjs"), str(tmp_path)], cwd=ROOT, check=True, timeout=300)
    for name in ("three.bundle.js", "LICENSE-three.txt", "VERSIONS.json"):
        assert (tmp_path / name).read_bytes() == (VENDOR / name).read_bytes(), name
