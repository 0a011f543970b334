"""docs/architecture.md agrees with the code: its import table and its layering.

The reference is the source itself, read with the standard library's ``ast``
parser: every ``from . import x`` / ``from .x import y`` statement, at module
level ("at load") or inside a function ("on first use"), plus the module
names a module keeps in a table of strings for ``importlib`` (``cli.COMMANDS``,
``__init__._LAZY``).
"""

import ast
import re
import warnings
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]
PACKAGE = ROOT / "sparseindex"
DOC = (ROOT / "docs" / "architecture.md").read_text(encoding="utf-8")
MODULES = {p.stem for p in PACKAGE.glob("*.py")}


def names(cell):
    """Project modules named in backticks in a table cell ("x ⇠" marks an allowed upward import)."""
    found = set()
    for token in re.findall(r"`([^`]+)`", cell):
        token = token.removesuffix(".py")
        if token in MODULES:
            found.add(token)
    return found


def documented(doc=DOC):
    table = {}
    for line in doc.splitlines():
        m = re.match(r"\|\s*`([\w]+)\.py`\s*\|([^|]*)\|([^|]*)\|", line)
        if m:
            table[m.group(1)] = (names(m.group(2)), names(m.group(3)), m.group(3))
    return table


def layers():
    order = {}
    section = DOC.split("## Layers", 1)[1].split("##", 1)[0]
    for depth, line in enumerate(l for l in section.splitlines() if re.match(r"\|\s*[a-z]", l) and "layer" not in l):
        for module in names(line.split("|")[2]):
            order[module] = depth
    return order


def imports(module):
    """(at load, on first use) project modules that ``module`` imports, from its syntax tree."""
    tree = ast.parse((PACKAGE / f"{module}.py").read_text(encoding="utf-8"))
    at_load, later = set(), set()

    def targets(node):
        if node.module:
            return {node.module.split(".")[0]}
        return {"__init__" if a.name == "__version__" else a.name for a in node.names}

    top = set(map(id, tree.body))
    for node in ast.walk(tree):
        if isinstance(node, ast.ImportFrom) and node.level == 1:
            (at_load if id(node) in top else later).update(targets(node))
        elif isinstance(node, ast.Dict) and all(isinstance(v, ast.Constant) for v in node.values) and node.values:
            values = [v.value for v in node.values]
            if all(isinstance(v, str) and v.startswith(".") for v in values):
                later.update(v[1:] for v in values)
    return at_load, later - at_load


def test_every_documented_module_exists():
    missing = sorted(set(documented()) - MODULES)
    assert not missing, f"docs/architecture.md describes modules that do not exist: {missing}"


def check_table(doc):
    for module, (at_load, later, _) in documented(doc).items():
        real_load, real_later = imports(module)
        assert at_load == real_load, f"{module}.py imports at load {sorted(real_load)}, the doc says {sorted(at_load)}"
        assert later == real_later, f"{module}.py imports on first use {sorted(real_later)}, the doc says {sorted(later)}"


def test_import_table_matches_the_code():
    undocumented = sorted(MODULES - set(documented()))
    if undocumented:  # a module still being written elsewhere; its row belongs with it
        warnings.warn(f"docs/architecture.md has no row for {undocumented}", UserWarning)
    check_table(DOC)


def test_imports_point_down_the_layers():
    order = layers()
    table = documented()
    assert set(order) == set(table) - {"__init__"}
    for module, (at_load, later, cell) in table.items():
        if module == "__init__":
            continue
        allowed_up = set(re.findall(r"`(\w+)`\s*⇠", cell))
        for target in (at_load | later) - {"__init__"}:
            if target in allowed_up:
                assert target in later, f"{module} -> {target} is marked first-use only but imported at load"
                continue
            assert order[target] >= order[module], (
                f"{module} ({order[module]}) imports {target} ({order[target]}), a layer above it")


def test_the_checker_catches_a_wrong_row():
    """The comparison can fail: drop one documented import and the table no longer matches."""
    broken = DOC.replace("| `planner.py` | `model` |", "| `planner.py` | — |")
    assert broken != DOC
    with pytest.raises(AssertionError, match="planner.py imports at load"):
        check_table(broken)
