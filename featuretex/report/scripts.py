"""The scripts a page carries inline, and the content-security policy that allows exactly those.

Pages open from disk (file://) with no network: every script is inside the page, and the policy
names each one by its SHA-256 hash (CSP Level 3 hash sources), so nothing else can run, not even
a script injected through text the page shows. Images are data: URIs; the 3D view decodes the
texture embedded in model.glb through a blob: URL it makes itself.
"""

from __future__ import annotations

import base64
import hashlib
import json
from functools import cache
from pathlib import Path

HERE = Path(__file__).parent
THREE = "vendor/three.bundle.js"      # three.js, bundled by vendor/build.mjs (version in vendor/VERSIONS.json)


@cache
def asset(name: str) -> str:
    """The text of a script shipped in featuretex/report/ (js/..., vendor/...)."""
    text = (HERE / name).read_text(encoding="utf-8")
    if "</script" in text.lower():          # would end the inline <script> element early
        raise ValueError(f"{name} cannot be inlined: it contains '</script'")
    return text


def three_version() -> str:
    return json.loads((HERE / "vendor" / "VERSIONS.json").read_text(encoding="utf-8"))["three"]


def sha256_source(script: str) -> str:
    return "'sha256-" + base64.b64encode(hashlib.sha256(script.encode("utf-8")).digest()).decode("ascii") + "'"


def policy(scripts: list[str]) -> str:
    """The page's Content-Security-Policy: only these inline scripts, images from data:/blob:."""
    allowed = " ".join(sha256_source(s) for s in scripts) or "'none'"
    return ("default-src 'none'; img-src data: blob:; style-src 'unsafe-inline'; connect-src blob:; "
            f"script-src {allowed}; base-uri 'none'; form-action 'none'")


def tags(scripts: list[str]) -> str:
    return "".join(f"<script>{s}</script>" for s in scripts)
