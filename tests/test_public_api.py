"""The public face is what the docs use: every name the README imports comes from the
package root, every type a user receives is exported there, and no docstring names a
module or object that does not exist."""

from __future__ import annotations

import ast
import importlib
import re
import textwrap
from pathlib import Path

import jax
import jax.numpy as jnp
import numpy as np
import pytest

import fisherwalk

ROOT = Path(__file__).resolve().parents[1]
SRC = ROOT / "src" / "fisherwalk"


def _code_blocks(markdown: str) -> list[str]:
    # blocks inside a list item are indented as a whole
    return [textwrap.dedent(block)
            for block in re.findall(r"```python\n(.*?)```", markdown, flags=re.S)]


def test_readme_imports_only_from_the_package_root():
    for block in _code_blocks((ROOT / "README.md").read_text()):
        for node in ast.walk(ast.parse(block)):
            if isinstance(node, ast.ImportFrom) and (node.module or "").startswith("fisherwalk"):
                assert node.module == "fisherwalk", f"README imports from {node.module}"
                for alias in node.names:
                    assert alias.name in fisherwalk.__all__, alias.name
            if (isinstance(node, ast.Attribute) and isinstance(node.value, ast.Name)
                    and node.value.id == "fisherwalk"):
                assert hasattr(fisherwalk, node.attr), f"README uses fisherwalk.{node.attr}"


def _resolves(dotted: str) -> bool:
    parts = dotted.split(".")
    for cut in range(len(parts), 0, -1):
        try:
            obj = importlib.import_module(".".join(parts[:cut]))
        except ImportError:
            continue
        try:
            for attr in parts[cut:]:
                obj = getattr(obj, attr)
        except AttributeError:
            return False
        return True
    return False


def test_every_dotted_name_in_a_docstring_exists():
    missing = []
    pattern = re.compile(r"\bfisherwalk(?:\.[A-Za-z_][A-Za-z0-9_]*)+")
    for path in sorted(SRC.rglob("*.py")):
        if path.name == "plots.py":  # needs the optional extra; checked below when present
            pytest.importorskip("matplotlib")
        for node in ast.walk(ast.parse(path.read_text())):
            if isinstance(node, ast.Constant) and isinstance(node.value, str):
                for name in pattern.findall(node.value):
                    name = name.rstrip(".")
                    if not _resolves(name):
                        missing.append(f"{path.relative_to(ROOT)}: {name}")
    assert not missing, "\n".join(missing)


def _fisherwalk_types(value, seen: set, depth: int = 0) -> set[type]:
    """Types defined in fisherwalk reachable from ``value`` through NamedTuple fields."""
    kind = type(value)
    found = set()
    if id(value) in seen or depth > 6:
        return found
    seen.add(id(value))
    if kind.__module__.startswith("fisherwalk"):
        if kind.__name__ == "Model":  # the closures over the log density: internal
            return found
        found.add(kind)
    if isinstance(value, tuple) and hasattr(kind, "_fields"):
        for field in value:
            found |= _fisherwalk_types(field, seen, depth + 1)
    elif isinstance(value, (list, tuple)):
        for item in value[:4]:
            found |= _fisherwalk_types(item, seen, depth + 1)
    return found


@pytest.mark.slow
@pytest.mark.parametrize("sampler", ["rwm", "nuts"])
def test_every_type_a_user_receives_is_exported(sampler):
    def logdensity(theta):
        return -0.5 * jnp.sum((theta - 1.0) ** 2 / jnp.array([1.0, 4.0]))

    walker = fisherwalk.start(logdensity, jnp.zeros(2), jax.random.key(0), chains=2,
                              sampler=sampler)
    walker = fisherwalk.refine(walker, jax.random.key(1), steps=50)
    trace = fisherwalk.walk(walker, jax.random.key(2), draws=100)
    received = set()
    for value in (walker, trace, trace.summary()):
        received |= _fisherwalk_types(value, set())
    exported = {getattr(fisherwalk, name) for name in fisherwalk.__all__}
    assert not {t.__name__ for t in received if t not in exported}
    assert np.isfinite(trace.flat).all()
