"""The shape of the code: the wings of DEVELOPERS.md, no import circles, no private names across modules,
modules and functions of a readable size.  These are the project's own rules (DEVELOPERS.md,
"Architecture"), checked on the source with Python's own parser (the `ast` module of the standard library).
"""
from __future__ import annotations

import ast
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parent.parent
PACKAGE = ROOT / "dnmr"

#: The layers, lowest first: a module may import at module level only from its own layer or below.
LAYERS = (
    ("dnmr.errors", "dnmr.nuclei", "dnmr.modelparts", "dnmr.model", "dnmr.kinetics", "dnmr.formatting", "dnmr.notebook",
     "dnmr.posterior", "dnmr.importance"),
    ("dnmr.io",),
    ("dnmr.engine",),
    ("dnmr.activation",),
    ("dnmr.fitting", "dnmr.planning"),
    ("dnmr.reporting",),
    ("dnmr.cli", "dnmr.demo", "dnmr.jobs", "dnmr.__main__", "dnmr"),
)
MAX_MODULE_LINES = 600
MAX_FUNCTION_LINES = 60


def _module_name(path: Path) -> str:
    parts = list(path.relative_to(ROOT).with_suffix("").parts)
    return ".".join(parts[:-1] if parts[-1] == "__init__" else parts)


MODULES = {_module_name(p): p for p in sorted(PACKAGE.rglob("*.py"))}
TREES = {name: ast.parse(path.read_text(encoding="utf-8")) for name, path in MODULES.items()}


def _layer(module: str) -> int:
    for i, members in enumerate(LAYERS):
        if any(module == m or module.startswith(m + ".") for m in members if m != "dnmr") or module in members:
            return i
    raise AssertionError(f"{module} belongs to no layer of DEVELOPERS.md")


def _imports(module: str, *, top_level_only: bool) -> set[str]:
    """The dnmr modules `module` imports (packages' lazy __init__ files left out)."""
    path, tree = MODULES[module], TREES[module]
    package = module if path.name == "__init__.py" else module.rsplit(".", 1)[0]
    nodes = tree.body if top_level_only else ast.walk(tree)
    found = set()
    for node in nodes:
        if isinstance(node, ast.ImportFrom):
            base = package.split(".")[: len(package.split(".")) - node.level + 1] if node.level else []
            target = ".".join(base + [node.module]) if node.module else ".".join(base)
            candidates = [target] + [f"{target}.{a.name}" for a in node.names]
        elif isinstance(node, ast.Import):
            candidates = [a.name for a in node.names]
        else:
            continue
        found |= {c for c in candidates if c in MODULES and c != module and MODULES[c].name != "__init__.py"}
    return found


def test_every_module_belongs_to_a_layer_and_imports_only_downwards():
    wrong = [f"{m} imports {t}" for m in MODULES for t in _imports(m, top_level_only=True) if _layer(t) > _layer(m)]
    assert not wrong, wrong


def test_no_import_circles():
    graph = {m: _imports(m, top_level_only=False) for m in MODULES}
    circles, state = [], {}

    def visit(node: str, path: list[str]) -> None:
        state[node] = "open"
        for nxt in sorted(graph[node]):
            if state.get(nxt) == "open":
                circles.append(path[path.index(nxt):] + [nxt])
            elif nxt not in state:
                visit(nxt, path + [nxt])
        state[node] = "done"

    for module in sorted(graph):
        if module not in state:
            visit(module, [module])
    assert not circles, [" -> ".join(c) for c in circles]


@pytest.mark.parametrize("folder", ["dnmr", "tests", "benchmarks", "examples"])
def test_no_private_name_is_used_across_modules(folder):
    found = []
    for path in sorted((ROOT / folder).rglob("*.py")):
        tree = ast.parse(path.read_text(encoding="utf-8"))
        imported = set()
        for node in ast.walk(tree):
            if isinstance(node, ast.ImportFrom) and (node.level or (node.module or "").startswith("dnmr")):
                imported |= {a.asname or a.name for a in node.names}
                found += [f"{path.name}: {a.name}" for a in node.names if _private(a.name)]
            elif isinstance(node, ast.Import):
                imported |= {(a.asname or a.name).split(".")[0] for a in node.names if a.name.startswith("dnmr")}
        found += [f"{path.name}: {n.value.id}.{n.attr}" for n in ast.walk(tree)
                  if isinstance(n, ast.Attribute) and _private(n.attr) and isinstance(n.value, ast.Name)
                  and n.value.id in imported]
    assert not found, found


def _private(name: str) -> bool:
    return name.startswith("_") and not name.startswith("__")


def test_modules_are_short_enough_to_read():
    long = {str(p.relative_to(ROOT)): n for p in MODULES.values()
            if (n := len(p.read_text(encoding="utf-8").splitlines())) > MAX_MODULE_LINES}
    assert not long, long


def test_functions_are_short_enough_to_read():
    long = []
    for module, tree in TREES.items():
        for node in ast.walk(tree):
            if isinstance(node, (ast.FunctionDef, ast.AsyncFunctionDef)):
                body = node.body
                has_doc = (isinstance(body[0], ast.Expr) and isinstance(body[0].value, ast.Constant)
                           and isinstance(body[0].value.value, str))
                first = body[1] if has_doc and len(body) > 1 else body[0]
                if node.end_lineno - first.lineno + 1 > MAX_FUNCTION_LINES:
                    long.append(f"{module}.{node.name}")
    assert not long, long


def test_lmfit_stays_inside_the_fitting_wing():
    # DEVELOPERS.md "Names" and "Conventions": lmfit is the fitting wing's own business; outside it results
    # hand out dnmr's FitParameter records (issue 16), so no other module imports lmfit or reads the
    # fitting wing's lmfit_parameters
    outside = []
    for module, tree in TREES.items():
        if module.startswith("dnmr.fitting"):
            continue
        for node in ast.walk(tree):
            names = ([a.name for a in node.names] if isinstance(node, ast.Import)
                     else [node.module or ""] if isinstance(node, ast.ImportFrom) else [])
            if any(n == "lmfit" or n.startswith("lmfit.") for n in names):
                outside.append(f"{module} imports lmfit")
            if isinstance(node, ast.Attribute) and node.attr == "lmfit_parameters":
                outside.append(f"{module} reads lmfit_parameters")
    assert not outside, outside
