"""docs/architecture.md agrees with the code: its import table, its layering, and private names.

The reference is the source itself, read with the standard library's ``ast``
parser: every relative ``from . import x`` / ``from .x import y`` statement,
at module level ("at load") or inside a function ("on first use"), plus the
module names a module keeps in a table of strings for ``importlib``
(``cli.COMMANDS``, ``__init__._LAZY``). Modules are named by their dotted
path inside the package (``store.format``; a package by its folder).
"""

import ast
import collections
import json
import re
import warnings
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]
PACKAGE = ROOT / "sparseindex"
DOC = (ROOT / "docs" / "architecture.md").read_text(encoding="utf-8")
ALLOWED_PRIVATE = ROOT / "tests" / "private_access_allowed.json"


def dotted(path: Path) -> str:
    parts = list(path.relative_to(PACKAGE).with_suffix("").parts)
    if parts[-1] == "__init__":
        parts = parts[:-1]
    return ".".join(parts) or "__init__"


FILES = {dotted(p): p for p in sorted(PACKAGE.rglob("*.py"))}
MODULES = set(FILES)


def _package_parts(module):
    parts = [] if module == "__init__" else module.split(".")
    return parts if FILES[module].name == "__init__.py" else parts[:-1]


def _resolve(module, level, name):
    base = _package_parts(module)
    return base[: len(base) - (level - 1)] + (name.split(".") if name else [])


def _target(parts, name):
    candidate = ".".join(parts + [name])
    return candidate if candidate in MODULES else ".".join(parts) or "__init__"


def names(cell):
    """Project modules named in backticks in a table cell."""
    found = set()
    for token in re.findall(r"`([^`]+)`", cell):
        token = token.removesuffix(".py").replace("/", ".").removesuffix(".__init__")
        if token in MODULES:
            found.add(token)
    return found


def documented(doc=DOC):
    table = {}
    for line in doc.splitlines():
        m = re.match(r"\|\s*`([\w/]+)\.py`\s*\|([^|]*)\|([^|]*)\|", line)
        if m:
            module = m.group(1).replace("/", ".").removesuffix(".__init__")
            table[module] = (names(m.group(2)), names(m.group(3)), m.group(3))
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
    tree = ast.parse(FILES[module].read_text(encoding="utf-8"))
    at_load, later = set(), set()
    top = set(map(id, tree.body))
    for node in ast.walk(tree):
        if isinstance(node, ast.ImportFrom) and node.level >= 1:
            parts = _resolve(module, node.level, node.module)
            for alias in node.names:
                (at_load if id(node) in top else later).add(_target(parts, alias.name))
        elif isinstance(node, ast.Dict) and node.values and all(
                isinstance(v, ast.Constant) and isinstance(v.value, str) and v.value.startswith(".")
                for v in node.values):
            later.update(".".join(_resolve(module, 1, v.value[1:])) for v in node.values)
    at_load.discard(module)
    later.discard(module)
    return at_load, later - at_load


def private_accesses(module):
    """Counter of every reach into another module's or object's private names in ``module``.

    ``x._name`` for any ``x`` other than ``self``/``cls`` (``self._a._b``
    counts: it reads the private state of the object ``self._a``), and every
    ``from ... import _name``, ``from . import _module`` included.
    """
    return private_in(FILES[module].read_text(encoding="utf-8"))


def private_in(source: str) -> collections.Counter:
    tree = ast.parse(source)
    found = collections.Counter()
    private = lambda name: name.startswith("_") and not (name.startswith("__") and name.endswith("__"))  # noqa: E731
    for node in ast.walk(tree):
        if isinstance(node, ast.Attribute) and private(node.attr):
            if isinstance(node.value, ast.Name) and node.value.id in ("self", "cls"):
                continue
            found[f"{ast.unparse(node.value)}.{node.attr}"] += 1
        elif isinstance(node, ast.ImportFrom):
            for alias in node.names:
                if private(alias.name):
                    found[f"import {alias.name}"] += 1
    return found


def test_every_documented_module_exists():
    missing = sorted(set(documented()) - MODULES)
    assert not missing, f"docs/architecture.md describes modules that do not exist: {missing}"


def check_table(doc):
    for module, (at_load, later, _) in documented(doc).items():
        real_load, real_later = imports(module)
        assert at_load == real_load, f"{module} imports at load {sorted(real_load)}, the doc says {sorted(at_load)}"
        assert later == real_later, f"{module} imports on first use {sorted(real_later)}, the doc says {sorted(later)}"


def test_import_table_matches_the_code():
    undocumented = sorted(MODULES - set(documented()))
    if undocumented:  # a module still being written elsewhere; its row belongs with it
        warnings.warn(f"docs/architecture.md has no row for {undocumented}", UserWarning)
    check_table(DOC)


def test_imports_point_down_the_layers():
    order = layers()
    table = documented()
    assert set(order) == set(table) - {"__init__"}
    for module, (at_load, later, _) in table.items():
        if module == "__init__":
            continue
        for target in (at_load | later) - {"__init__"}:
            assert order[target] >= order[module], (
                f"{module} ({order[module]}) imports {target} ({order[target]}), a layer above it")


def test_the_layers_are_in_the_designed_order():
    """Lowest first: base, kernels, codes, model, health, store parts, contract, stores, near-duplicates, CLI."""
    order = layers()
    want = [["errors", "validation"], ["_numba.kernels"], ["codes"], ["model", "model.planner"], ["health"],
            ["store.rows", "store.bank", "store.guard", "store.format"], ["store.contract"],
            ["store.single", "cluster.sharded"], ["near_duplicates.labelling"], ["cli", "demo"]]
    depth = [{order[m] for m in group} for group in want]
    assert all(len(d) == 1 for d in depth), depth
    depth = [d.pop() for d in depth]
    assert depth == sorted(depth, reverse=True) and len(set(depth)) == len(depth), depth


def test_the_checker_catches_a_wrong_row():
    """The comparison can fail: drop one documented import and the table no longer matches."""
    broken = DOC.replace("| `model/planner.py` | `errors`, `model.hypergeometric`, `validation` |",
                         "| `model/planner.py` | — |")
    assert broken != DOC
    with pytest.raises(AssertionError, match="model.planner imports at load"):
        check_table(broken)


def test_no_new_private_access_and_the_allowed_list_only_shrinks():
    """Every reach into private names is on the allowed list, with exactly its count and a reason.

    A new one fails; one that went away fails too until the list is shrunk
    (``python -m tests.test_architecture > tests/private_access_allowed.json``
    regenerates it, keeping the reasons — review that the diff only removes).
    The list may hold at most 10 entries.
    """
    allowed = json.loads(ALLOWED_PRIVATE.read_text(encoding="utf-8"))
    entries = [(m, e) for m, listed in allowed.items() for e in listed]
    assert len(entries) <= 10, f"{len(entries)} allowed private accesses, at most 10: {entries}"
    for module in sorted(MODULES):
        real = private_accesses(module)
        listed = allowed.get(module, {})
        new = sorted(set(real) - set(listed))
        assert not new, f"{module}: new private access {new}; use a public name or the stats() snapshot"
        for expr, entry in listed.items():
            assert len(entry.get("why", "")) > 20 and "TODO" not in entry["why"], f"{module}: {expr} needs a reason"
            count = entry["count"]
            assert real.get(expr, 0) <= count, f"{module}: {expr} used {real[expr]} times, {count} allowed"
            assert real.get(expr, 0) == count, (
                f"{module}: {expr} now used {real.get(expr, 0)} times, not {count}: shrink the allowed list")


def test_the_private_access_counter_sees_what_it_must():
    sample = "from .x import _a\nfrom . import _b, __version__\nother._c\nself._d\nself._e._f\ncls._g\nx.__len__\n"
    assert private_in(sample) == {"import _a": 1, "import _b": 1, "other._c": 1, "self._e._f": 1}


def regenerated() -> dict:
    """The allowed list as the code stands, keeping the reasons already written."""
    old = json.loads(ALLOWED_PRIVATE.read_text(encoding="utf-8")) if ALLOWED_PRIVATE.exists() else {}
    out = {}
    for m in sorted(MODULES):
        found = private_accesses(m)
        if found:
            out[m] = {e: {"count": n, "why": old.get(m, {}).get(e, {}).get("why", "TODO: say why")}
                      for e, n in sorted(found.items())}
    return out


if __name__ == "__main__":
    print(json.dumps(regenerated(), indent=1))
