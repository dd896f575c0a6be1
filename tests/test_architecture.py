"""The package's house rules, checked on its source (ast, no imports executed):

- no import cycles between modules, including imports placed inside functions;
- no ``_private`` name imported from another module;
- the sub-packages import one way only, along the data's path: errors, base < theory < fit
  < models < results < engine < samplers < tuned < persistence < prepare < workflow < cli
  (a layer may import from itself and from the layers before it, never after).
"""

from __future__ import annotations

import ast
from pathlib import Path

import pytest

PACKAGE = Path(__file__).resolve().parents[1] / "src" / "fisherwalk"
LAYERS = ("errors", "base", "theory", "fit", "models", "results", "engine", "samplers", "tuned",
          "persistence", "prepare", "workflow", "cli")


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


# --------------------------------------------------------------- the sampler kind rule
#
# A sampler family's behaviour is asked of its registry entry (fisherwalk.samplers),
# never re-discovered. Outside the families' own modules (fisherwalk.samplers.*) and
# their theory (fisherwalk.theory.*), the source may not:
#   - compare anything with a registered family's name ("rwm", "nuts", ...): ==, !=, in;
#   - test a kind-specific type: isinstance(x, C) for C in KIND_TYPES;
#   - probe for a kind-specific field: hasattr(x, F) or getattr(x, F, default) for F in
#     KIND_FIELDS;
#   - ask a walker whether it is a gradient sampler: <...>walker.gradient.

FAMILIES = PACKAGE / "samplers"
KIND_TYPES = {"GradientTuning", "GradientEngine", "MALAState", "HMCState", "RWState"}
KIND_FIELDS = {"sampler", "step_size", "scale", "logdensity_grad", "integration_steps",
               "gradient"}
EXEMPT = ("fisherwalk.samplers", "fisherwalk.theory")


def _family_names() -> set[str]:
    """The ``name=`` of every Family built in the families' modules (ast, not imported)."""
    names = set()
    for path in FAMILIES.glob("*.py"):
        for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"))):
            if isinstance(node, ast.Call):
                for kw in node.keywords:
                    if (kw.arg == "name" and isinstance(kw.value, ast.Constant)
                            and isinstance(kw.value.value, str)):
                        names.add(kw.value.value)
    return names


def _strings(node) -> list[str]:
    if isinstance(node, ast.Constant) and isinstance(node.value, str):
        return [node.value]
    if isinstance(node, ast.Tuple | ast.List | ast.Set):
        return [s for element in node.elts for s in _strings(element)]
    return []


def _kind_checks(tree: ast.AST, families: set[str]) -> list[tuple[int, str]]:
    found = []
    for node in ast.walk(tree):
        if isinstance(node, ast.Compare):
            for part in (node.left, *node.comparators):
                hits = [s for s in _strings(part) if s in families]
                if hits:
                    found.append((node.lineno, f"compares with the family name {hits[0]!r}"))
        elif isinstance(node, ast.Call) and isinstance(node.func, ast.Name):
            args = node.args
            if node.func.id == "isinstance" and len(args) == 2:
                classes = [n.id if isinstance(n, ast.Name) else getattr(n, "attr", "")
                           for n in ([args[1]] if not isinstance(args[1], ast.Tuple)
                                     else args[1].elts)]
                for c in classes:
                    if c in KIND_TYPES:
                        found.append((node.lineno, f"isinstance(..., {c})"))
            if (node.func.id == "hasattr" and len(args) == 2
                    or node.func.id == "getattr" and len(args) == 3):
                hits = [s for s in _strings(args[1]) if s in KIND_FIELDS]
                if hits:
                    found.append((node.lineno, f"{node.func.id}(..., {hits[0]!r})"))
        elif isinstance(node, ast.Attribute) and node.attr == "gradient":
            receiver = node.value
            name = (receiver.id if isinstance(receiver, ast.Name)
                    else getattr(receiver, "attr", ""))
            if name == "walker":
                found.append((node.lineno, "walker.gradient"))
    return found


def test_the_family_names_are_found():
    assert {"rwm", "mala", "hmc", "nuts"} <= _family_names()


def test_no_sampler_kind_checks_outside_the_families():
    families = _family_names()
    wrong = []
    for path in sorted(PACKAGE.rglob("*.py")):
        module = _module_name(path)
        if module.startswith(EXEMPT):
            continue
        for line, what in _kind_checks(ast.parse(path.read_text(encoding="utf-8")), families):
            wrong.append(f"{path.relative_to(PACKAGE.parent)}:{line}: {what}")
    assert not wrong, "ask the registry's family instead:\n" + "\n".join(wrong)


def test_the_kind_rule_catches_each_form():
    # the rule itself, on snippets: each form is caught, the registry's way is not
    families = {"rwm", "nuts"}
    caught = {
        'if sampler == "nuts": pass': "family name",
        'ok = name in ("rwm", "x")': "family name",
        "isinstance(t, GradientTuning)": "isinstance",
        'hasattr(tuning, "step_size")': "hasattr",
        'getattr(tuning, "sampler", "rwm")': "getattr",
        "if trace.walker.gradient: pass": "walker.gradient",
    }
    for snippet in caught:
        assert _kind_checks(ast.parse(snippet), families), snippet
    for snippet in ('family = registry.family(tuning.sampler)', 'x = walker.family.label',
                    'if sampler == registry.AUTO: pass', 's.gradient'):
        assert not _kind_checks(ast.parse(snippet), families), snippet
