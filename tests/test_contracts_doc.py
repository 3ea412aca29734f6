"""docs/contracts.md documents every key the scene reader accepts, and only those."""

import re
from pathlib import Path

from featuretex.scene import manifest

DOC = Path(__file__).resolve().parents[1] / "docs" / "contracts.md"


def _table_keys(heading: str) -> set[str]:
    """Backticked names in the first column of the table under `heading`."""
    text = DOC.read_text(encoding="utf-8")
    section = text.split(heading, 1)[1].split("\n#", 1)[0]
    keys: set[str] = set()
    for line in section.splitlines():
        if line.startswith("| `"):
            keys.update(re.findall(r"`([a-z_0-9]+)`", line.split("|")[1]))
    return keys


def test_scene_tables_match_the_reader():
    assert _table_keys("### Top level") == manifest.TOP_KEYS
    assert _table_keys("### Camera (`cameras.<id>`)") == manifest.CAMERA_KEYS
    assert _table_keys("### View (`views[i]`)") == manifest.VIEW_KEYS


def test_format_name_is_the_readers():
    assert f"`{manifest.FORMAT}`" in DOC.read_text(encoding="utf-8")
