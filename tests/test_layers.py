"""The package's layering, checked on its import graph (read with ``ast``, nothing imported).

Layers import only downward (DEVELOPERS.md, "Layers"): a module may import modules of its own
layer or of lower layers, never of a higher one, and the graph has no cycle. Every module must
be declared in :data:`LAYERS` (a new module is placed deliberately). Imports under
``if TYPE_CHECKING:`` count too: a type is a dependency.
"""

from __future__ import annotations

import ast
from pathlib import Path

import pytest

import phantometry

ROOT = Path(phantometry.__file__).resolve().parent

#: module (or package prefix, ending in ".") -> layer; the longest matching prefix wins.
LAYERS: dict[str, int] = {
    "phantometry.errors": 0,
    # 1: data types, formats, files
    "phantometry": 1,  # the package itself (version, a few re-exports)
    "phantometry.volume": 1,
    "phantometry.io.": 1,
    "phantometry.io": 1,
    "phantometry.templates": 1,
    "phantometry.fill": 1,
    "phantometry.nuclides": 1,
    "phantometry.sitetime": 1,
    "phantometry.timeutil": 1,
    "phantometry.results": 1,
    "phantometry.yamlfile": 1,
    "phantometry.resources": 1,
    "phantometry.threads": 1,
    "phantometry.fftconv": 1,
    "phantometry._agg": 1,
    "phantometry.outputs": 1,
    # 2: geometry, ROI engine, metrics, noise, bands, synthesizer
    "phantometry.locate": 2,
    "phantometry.outline": 2,
    "phantometry.sampling": 2,
    "phantometry.background_rois": 2,
    "phantometry.rois": 2,
    "phantometry.metrics": 2,
    "phantometry.metrics.": 2,
    "phantometry.noise": 2,
    "phantometry.postfilter": 2,
    "phantometry.bands": 2,
    "phantometry.synth": 2,
    "phantometry.ranking": 2,
    # 3: phantom kinds and the outputs (which know only the phantoms.base types)
    "phantometry.phantoms": 3,
    "phantometry.phantoms.": 3,
    "phantometry.figures": 3,
    "phantometry.report": 3,
    "phantometry.protocol": 3,
    "phantometry.seg": 3,
    "phantometry.ledger": 3,
    "phantometry.ledger.": 3,
    # 4: pipelines
    "phantometry.measure": 4,
    "phantometry.compare": 4,
    "phantometry.compare.": 4,
    "phantometry.harmonise": 4,
    # 5: the command line
    "phantometry.cli": 5,
    "phantometry.cli.": 5,
    "phantometry.__main__": 5,
}


def _modules() -> dict[str, Path]:
    out = {}
    for path in ROOT.rglob("*.py"):
        rel = path.relative_to(ROOT.parent).with_suffix("")
        parts = list(rel.parts)
        if "migrations" in parts:  # Alembic scripts, run by Alembic only
            continue
        if parts[-1] == "__init__":
            parts = parts[:-1]
        out[".".join(parts)] = path
    return out


MODULES = _modules()


def layer_of(module: str) -> int:
    best, best_len = None, -1
    for key, layer in LAYERS.items():
        if key.endswith("."):
            if module.startswith(key) and len(key) > best_len:
                best, best_len = layer, len(key)
        elif module == key and len(key) > best_len:
            best, best_len = layer, len(key)
    if best is None:
        raise KeyError(module)
    return best


def _resolve(importer: str, is_package: bool, node: ast.ImportFrom) -> list[str]:
    if node.level == 0:
        base = node.module or ""
    else:
        parts = importer.split(".")
        if not is_package:
            parts = parts[:-1]
        parts = parts[: len(parts) - (node.level - 1)]
        base = ".".join(parts + ([node.module] if node.module else []))
    targets = []
    for alias in node.names:
        sub = f"{base}.{alias.name}"
        targets.append(sub if sub in MODULES else base)
    return targets


def imports_of(module: str) -> set[str]:
    path = MODULES[module]
    tree = ast.parse(path.read_text(encoding="utf-8"))
    found: set[str] = set()
    for node in ast.walk(tree):
        if isinstance(node, ast.Import):
            names = [a.name for a in node.names]
        elif isinstance(node, ast.ImportFrom):
            names = _resolve(module, path.name == "__init__.py", node)
        else:
            continue
        for name in names:
            if not (name == "phantometry" or name.startswith("phantometry.")):
                continue
            # importing a.b.c runs the packages a and a.b first
            parts = name.split(".")
            for n in range(1, len(parts) + 1):
                target = ".".join(parts[:n])
                if target in MODULES and target != module and not module.startswith(target + "."):
                    found.add(target)
    return found


GRAPH = {m: imports_of(m) for m in MODULES}


def test_every_module_has_a_layer():
    missing = []
    for m in MODULES:
        try:
            layer_of(m)
        except KeyError:
            missing.append(m)
    assert not missing, f"declare these modules' layers in tests/test_layers.py and DEVELOPERS.md: {missing}"


def test_no_upward_import():
    upward = [(m, t, layer_of(m), layer_of(t)) for m, ts in GRAPH.items() for t in ts if layer_of(t) > layer_of(m)]
    assert not upward, "upward imports (module, imports, its layer, their layer): " + "; ".join(map(str, sorted(upward)))


def test_no_import_cycle():
    # Tarjan's strongly connected components; any component of more than one module is a cycle
    index: dict[str, int] = {}
    low: dict[str, int] = {}
    stack: list[str] = []
    on_stack: set[str] = set()
    cycles: list[list[str]] = []
    counter = [0]

    def visit(v: str) -> None:
        index[v] = low[v] = counter[0]
        counter[0] += 1
        stack.append(v)
        on_stack.add(v)
        for w in GRAPH[v]:
            if w not in index:
                visit(w)
                low[v] = min(low[v], low[w])
            elif w in on_stack:
                low[v] = min(low[v], index[w])
        if low[v] == index[v]:
            comp = []
            while True:
                w = stack.pop()
                on_stack.discard(w)
                comp.append(w)
                if w == v:
                    break
            if len(comp) > 1:
                cycles.append(sorted(comp))

    for v in sorted(GRAPH):
        if v not in index:
            visit(v)
    assert not cycles, f"import cycles: {cycles}"


@pytest.mark.parametrize("module, target, ok", [
    ("phantometry.measure", "phantometry.phantoms", True),
    ("phantometry.rois", "phantometry.measure", False),
    ("phantometry.report", "phantometry.ranking", True),
    ("phantometry.report", "phantometry.compare.run", False),
])
def test_layer_rule_itself(module, target, ok):
    # the rule the tests above apply, on known cases
    assert (layer_of(target) <= layer_of(module)) is ok
