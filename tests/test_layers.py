"""Imports follow the data flow: the layers are the rows of DEVELOPERS.md's architecture table, in
order, and a module may import only from its own layer or a layer above it. Imports are read with
Python's own parser (`ast`), inside functions too, so a lazy import cannot hide an upward arrow."""

from __future__ import annotations

import ast
import re
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parent.parent
PACKAGE = ROOT / "featuretex"
PATH = re.compile(r"`(featuretex/[\w./-]*)`")


def table_rows(text: str) -> list[str]:
    """The body rows of the first table after the "## Architecture" heading."""
    rows: list[str] = []
    for line in text.split("## Architecture", 1)[1].splitlines():
        if line.startswith("|"):
            rows.append(line)
        elif rows:
            break
    return rows[2:]                                       # header and separator


def table_layers(text: str) -> list[tuple[str, set[str]]]:
    """(layer name, top-level names under featuretex/) per row of the architecture table, in order.

    A row's members are the paths one level below featuretex/ in its second column
    (`featuretex/x.py` or `featuretex/x/`); deeper paths must lie inside one of the row's members.
    Raises AssertionError naming what is wrong."""
    layers = []
    for row in table_rows(text):
        cells = [c.strip() for c in row.strip().strip("|").split("|")]
        members, deeper = set(), []
        for path in PATH.findall(cells[1]):
            parts = path.rstrip("/").split("/")
            if len(parts) == 2:
                members.add(parts[1].removesuffix(".py"))
            else:
                deeper.append(path)
        for path in deeper:
            assert path.split("/")[1] in members, f"{path} is named in row '{cells[0]}' but its package is not"
        assert members, f"row '{cells[0]}' names no package or module"
        layers.append((cells[0], members))
    return layers


def _type_only(tree: ast.Module) -> set[int]:
    """ids of the nodes inside `if TYPE_CHECKING:` blocks: imports for annotations only, never run."""
    skip: set[int] = set()
    for node in ast.walk(tree):
        if isinstance(node, ast.If) and isinstance(node.test, ast.Name) and node.test.id == "TYPE_CHECKING":
            skip |= {id(n) for stmt in node.body for n in ast.walk(stmt)}
    return skip


def imported_names(source: str) -> set[str]:
    """Top-level names under featuretex/ that `source` imports, anywhere in the module (imports
    for type annotations only, under `if TYPE_CHECKING:`, excepted: they never run)."""
    found = set()
    tree = ast.parse(source)
    skip = _type_only(tree)
    for node in ast.walk(tree):
        if id(node) in skip:
            continue
        if isinstance(node, ast.Import):
            mods = [a.name for a in node.names]
        elif isinstance(node, ast.ImportFrom) and node.level == 0 and node.module:
            mods = [node.module] if node.module != "featuretex" else [f"featuretex.{a.name}" for a in node.names]
        else:
            assert not isinstance(node, ast.ImportFrom), "relative import: write the full featuretex path"
            continue
        found |= {m.split(".")[1] for m in mods if m.startswith("featuretex.")}
    return found


def upward_imports(layers: list[tuple[str, set[str]]], sources: dict[str, str]) -> list[str]:
    """One line per import that runs against the flow. sources: module path (featuretex/...) -> text."""
    rank = {name: i for i, (_, members) in enumerate(layers) for name in members}
    out = []
    for path, source in sorted(sources.items()):
        own = path.split("/")[1].removesuffix(".py")
        for target in sorted(imported_names(source)):
            if target in rank and rank[target] > rank[own]:
                out.append(f"{path} ({layers[rank[own]][0]}) imports featuretex.{target} "
                           f"({layers[rank[target]][0]}), a later layer")
    return out


def package_sources() -> dict[str, str]:
    """featuretex/... path -> source of every module of the package but its own __init__."""
    return {str(p.relative_to(ROOT)): p.read_text(encoding="utf-8")
            for p in sorted(PACKAGE.rglob("*.py")) if p != PACKAGE / "__init__.py"}


@pytest.fixture(scope="module")
def layers():
    return table_layers((ROOT / "DEVELOPERS.md").read_text(encoding="utf-8"))


def test_table_names_existing_paths_once_each(layers):
    rows = table_rows((ROOT / "DEVELOPERS.md").read_text(encoding="utf-8"))
    missing = [p for row in rows for p in PATH.findall(row) if not (ROOT / p).exists()]
    assert not missing, f"DEVELOPERS.md's architecture table names paths that do not exist: {missing}"
    seen: dict[str, str] = {}
    for name, members in layers:
        for m in members:
            assert m not in seen, f"featuretex/{m} is in two layers: '{seen[m]}' and '{name}'"
            seen[m] = name


def test_every_module_belongs_to_a_layer(layers):
    members = set().union(*(m for _, m in layers))
    orphans = sorted({p.split("/")[1] for p in package_sources()} - {m + ".py" for m in members} - members)
    assert not orphans, f"featuretex/ holds modules no row of DEVELOPERS.md's architecture table names: {orphans}"


def test_no_import_runs_against_the_flow(layers):
    wrong = upward_imports(layers, package_sources())
    assert not wrong, "\n".join(wrong)


def test_the_check_sees_upward_and_lazy_imports():
    """The checker itself, on made-up modules: a top-level and a function-local upward import are
    both reported; downward and same-layer imports are not."""
    layers = [("base", {"errors"}), ("scene", {"scene"}), ("fit", {"fit", "model"})]
    sources = {
        "featuretex/scene/a.py": "from featuretex.fit.loop import run\n",
        "featuretex/scene/b.py": "def f():\n    import featuretex.model.texture\n",
        "featuretex/scene/c.py": "from featuretex import errors\nfrom featuretex.scene.mesh import M\n",
        "featuretex/fit/d.py": "from featuretex.model import decoders\nfrom featuretex.scene import mesh\n",
    }
    wrong = upward_imports(layers, sources)
    assert [w.split(" ")[0] for w in wrong] == ["featuretex/scene/a.py", "featuretex/scene/b.py"]
