"""Where the `scene` setting points: a scene.yaml, the folder holding one, or `demo`.

`demo` always means the bundled demo scene, even when the working folder holds a folder named
`demo` (then a warning says so; `./demo` names that folder).
"""

from __future__ import annotations

import logging
from pathlib import Path

log = logging.getLogger("featuretex")
DEMO = "demo"


def resolve_scene_path(scene: str) -> Path:
    """The scene.yaml (or folder) the setting names; the demo's is generated on first use."""
    if scene == DEMO:
        if Path(DEMO).exists():
            log.warning("scene=demo is the bundled demo scene, not the folder 'demo' here (write scene=./demo "
                        "for that folder)")
        from featuretex.demo import ensure_demo_scene

        return ensure_demo_scene()
    return Path(scene).expanduser()


def scene_folder(scene: str) -> Path | None:
    """The folder of the scene's files, without reading or building anything; None if not known
    yet (the demo scene before it was generated)."""
    if scene == DEMO:
        committed = Path(__file__).resolve().parents[2] / "demo_assets" / "scene"
        return committed if committed.is_dir() else None
    p = Path(scene).expanduser()
    return p.parent if p.suffix.lower() in (".yaml", ".yml") or p.is_file() else p
