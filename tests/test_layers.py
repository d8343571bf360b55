"""The package's layers import only the layers below them (see DEVELOPERS.md, "The map").

model <- io <- site <- survey, volume, stock <- ledger <- export <- close <- volume_report, _demo <- cli.
``errors``, ``parallel`` and ``_version`` import nothing of the package and are usable
everywhere; ``make demo``'s script sits on top of the command line. Siblings (survey, volume,
stock) do not import each other. Imports inside functions count too: a lazy import is still
a dependency.
"""

from __future__ import annotations

import ast
from pathlib import Path

import pytest

PACKAGE = Path(__file__).resolve().parents[1] / "inventory"

#: layer -> rank; a module may import a layer of lower rank, or its own layer.
RANK = {
    "errors": 0, "parallel": 0, "_version": 0,
    "model": 1,
    "io": 2,
    "site": 3,
    "survey": 4, "volume": 4, "stock": 4,
    "ledger": 5,
    "export": 6,
    "close": 7,
    "volume_report": 8,  # `inventory volumes`: the close's survey and volumes steps, no books
    "_demo": 8,  # the invented site's generator, behind `inventory sample`
    "cli": 9,
    "__main__": 10, "__init__": 10,
}
#: scripts that drive the command line itself
SCRIPTS = {"inventory._demo.run_demo": 10}


def _layer(module: str) -> str:
    parts = module.split(".")
    return parts[1] if len(parts) > 1 else "__init__"


def _module_of(path: Path) -> str:
    rel = path.relative_to(PACKAGE.parent).with_suffix("")
    parts = list(rel.parts)
    if parts[-1] == "__init__" and len(parts) > 1 and parts[-2] != "inventory":
        parts = parts[:-1]
    return ".".join(parts)


def _imports(path: Path) -> list[tuple[int, str]]:
    tree = ast.parse(path.read_text(encoding="utf-8"))
    found = []
    for node in ast.walk(tree):
        if isinstance(node, ast.ImportFrom):
            assert node.level == 0, f"{path}: relative import at line {node.lineno}; the package imports absolutely"
            if node.module and node.module.split(".")[0] == "inventory":
                if node.module == "inventory":
                    found += [(node.lineno, f"inventory.{a.name}") for a in node.names]
                else:
                    found.append((node.lineno, node.module))
        elif isinstance(node, ast.Import):
            found += [(node.lineno, a.name) for a in node.names if a.name.split(".")[0] == "inventory"]
    return found


MODULES = sorted(PACKAGE.rglob("*.py"))


def test_every_top_level_entry_has_a_rank():
    names = {p.name.removesuffix(".py") for p in PACKAGE.iterdir() if p.suffix == ".py" or (p / "__init__.py").exists()}
    assert names <= set(RANK), f"layers without a rank: {sorted(names - set(RANK))}"


@pytest.mark.parametrize("path", MODULES, ids=lambda p: str(p.relative_to(PACKAGE.parent)))
def test_module_imports_only_layers_below(path):
    me = _module_of(path)
    mine = _layer(me)
    my_rank = SCRIPTS.get(me, RANK[mine])
    bad = []
    for line, target in _imports(path):
        theirs = _layer(target)
        if theirs == mine and me not in SCRIPTS:
            continue
        if RANK[theirs] >= my_rank and not (theirs == mine and me in SCRIPTS):
            bad.append(f"line {line}: {target} ({theirs}) from {mine}")
    assert not bad, f"{me} imports upward or sideways: " + "; ".join(bad)
