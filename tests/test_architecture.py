"""The package's house rules, checked on its source (ast, no imports executed):

- no import cycles between modules, including imports placed inside functions;
- no ``_private`` name imported from another module;
- the sub-packages import one way only: errors, base < theory < fit < models < results <
  run < cli
  (a layer may import from itself and from the layers before it, never after).
"""

from __future__ import annotations

import ast
from pathlib import Path

import pytest

PACKAGE = Path(__file__).resolve().parents[1] / "src" / "fisherwalk"
LAYERS = ("errors", "base", "theory", "fit", "models", "results", "run", "cli")


def _module_name(path: Path) -> str:
    parts = path.relative_to(PACKAGE.parent).with_suffix("").parts
    return ".".join(parts[:-1] if parts[-1] == "__init__" else parts)


def _resolve(module: str, node: ast.ImportFrom, is_package: bool) -> str:
    if node.level == 0:
        return node.module or ""
    base = module.split(".")
    base = base if is_package else base[:-1]
    base = base[: len(base) - (node.level - 1)]
    return ".".join(base + ([node.module] if node.module else []))


def _imports() -> dict[str, list[tuple[str, str | None]]]:
    """module -> [(imported module, imported name or None)] for fisherwalk modules."""
    modules = {_module_name(p): p for p in PACKAGE.rglob("*.py")}
    found: dict[str, list[tuple[str, str | None]]] = {}
    for module, path in modules.items():
        tree = ast.parse(path.read_text(encoding="utf-8"))
        edges = []
        for node in ast.walk(tree):
            if isinstance(node, ast.Import):
                edges += [(a.name, None) for a in node.names if a.name.startswith("fisherwalk")]
            elif isinstance(node, ast.ImportFrom):
                target = _resolve(module, node, path.name == "__init__.py")
                if not target.startswith("fisherwalk"):
                    continue
                for alias in node.names:
                    sub = f"{target}.{alias.name}"
                    if sub in modules:  # "from . import engine": a module, not a name
                        edges.append((sub, None))
                    else:
                        edges.append((target, alias.name))
        found[module] = edges
    return found


def _layer(module: str) -> int | None:
    parts = module.split(".")
    if len(parts) < 2:
        return None  # the package root re-exports; it may import anything
    return LAYERS.index(parts[1]) if parts[1] in LAYERS else None


def test_the_package_was_found():
    assert len(_imports()) > 20


def test_no_import_cycles():
    graph = {m: {t for t, _ in edges if t != m and t != "fisherwalk"}
             for m, edges in _imports().items() if m != "fisherwalk"}
    seen: dict[str, int] = {}  # 1 = on the stack, 2 = done
    cycles = []

    def visit(node, stack):
        seen[node] = 1
        for nxt in sorted(graph.get(node, ())):
            if seen.get(nxt) == 1:
                cycles.append(stack[stack.index(nxt):] + [nxt])
            elif nxt not in seen:
                visit(nxt, stack + [nxt])
        seen[node] = 2

    for node in sorted(graph):
        if node not in seen:
            visit(node, [node])
    assert not cycles, "import cycles: " + "; ".join(" -> ".join(c) for c in cycles)


def test_no_private_names_cross_modules():
    crossing = [f"{m} imports {n} from {t}" for m, edges in _imports().items()
                for t, n in edges if n and n.startswith("_") and n != "__version__"]
    assert not crossing, "\n".join(crossing)


def test_layers_import_one_way():
    wrong = []
    for module, edges in _imports().items():
        mine = _layer(module)
        for target, _ in edges:
            theirs = _layer(target)
            if mine is not None and theirs is not None and theirs > mine:
                wrong.append(f"{module} ({LAYERS[mine]}) imports {target} ({LAYERS[theirs]})")
    assert not wrong, "\n".join(wrong)


@pytest.mark.parametrize("layer", LAYERS[1:])
def test_every_layer_is_a_package(layer):
    assert (PACKAGE / layer / "__init__.py").is_file()
