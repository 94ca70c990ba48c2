"""The package layout is the architecture: floors, no cycles, no stage reaching into another, cheap CLI import.

The floor order (low to high) is the one in README.md ("Code map"):
core < data < physics < inference < stages < job < commands/cli. A module may
import only from its own floor or lower; a module of one stage never imports
another stage (shared pieces live in physics/ or inference/); the import graph
has no cycle. The graph is read from the source with :mod:`ast` (top-level and
function-local imports alike), so a lazy import cannot hide an upward edge.
Common practice, no source.
"""

from __future__ import annotations

import ast
import os
import subprocess
import sys
from pathlib import Path


REPO = Path(__file__).resolve().parents[1]
PACKAGE = REPO / "cwsearch"

FLOORS = {"core": 0, "data": 1, "physics": 2, "inference": 3, "stages": 4, "job": 5, "commands": 6, "cli": 6,
          "__main__": 7}


def _module_name(path: Path) -> str:
    parts = list(path.relative_to(REPO).with_suffix("").parts)
    if parts[-1] == "__init__":
        parts = parts[:-1]
    return ".".join(parts)


def _modules() -> dict:
    return {_module_name(p): p for p in sorted(PACKAGE.rglob("*.py"))}


def _resolve(module: str, is_package: bool, node: ast.ImportFrom) -> str:
    if not node.level:
        return node.module or ""
    base = module.split(".") if is_package else module.split(".")[:-1]
    base = base[: len(base) - (node.level - 1)]
    return ".".join(base + ([node.module] if node.module else []))


def import_graph() -> dict:
    """module -> set of cwsearch modules it imports (``from pkg import name`` counts ``pkg.name`` when
    that is a module)."""
    modules = _modules()
    graph = {}
    for name, path in modules.items():
        tree = ast.parse(path.read_text(encoding="utf-8"))
        edges = set()
        for node in ast.walk(tree):
            if isinstance(node, ast.Import):
                targets = [a.name for a in node.names]
            elif isinstance(node, ast.ImportFrom):
                src = _resolve(name, path.name == "__init__.py", node)
                targets = [f"{src}.{a.name}" if f"{src}.{a.name}" in modules else src for a in node.names]
            else:
                continue
            for target in targets:
                while target and target not in modules:
                    target = target.rpartition(".")[0]
                if target.startswith("cwsearch") and target != name and target != "cwsearch":
                    edges.add(target)
        graph[name] = edges
    return graph


def _floor(module: str):
    parts = module.split(".")
    return FLOORS.get(parts[1]) if len(parts) > 1 else None


def _stage(module: str):
    parts = module.split(".")
    return parts[2] if len(parts) > 3 and parts[1] == "stages" else None


def test_every_module_has_a_floor():
    unplaced = [m for m in _modules() if m != "cwsearch" and _floor(m) is None]
    assert unplaced == []


def test_no_upward_import_and_no_stage_imports_another():
    bad = []
    for module, targets in import_graph().items():
        for target in targets:
            if _floor(module) is not None and _floor(target) is not None and _floor(target) > _floor(module):
                bad.append(f"{module} -> {target} (upward)")
            if _stage(module) and _stage(target) and _stage(module) != _stage(target):
                bad.append(f"{module} -> {target} (one stage importing another)")
    assert bad == []


def test_import_graph_has_no_cycle():
    graph = import_graph()
    state, stack, cycles = {}, [], []

    def visit(node):
        state[node] = "open"
        stack.append(node)
        for nxt in sorted(graph.get(node, ())):
            if state.get(nxt) == "open":
                cycles.append(stack[stack.index(nxt):] + [nxt])
            elif nxt not in state:
                visit(nxt)
        stack.pop()
        state[node] = "done"

    for node in sorted(graph):
        if node not in state:
            visit(node)
    assert cycles == []


def test_the_graph_walker_sees_known_edges():
    """The checks above are not vacuous: the walker finds known edges of the package."""
    graph = import_graph()
    assert "cwsearch.core.errors" in graph["cwsearch.data.dataset"]
    assert "cwsearch.physics.noise" in graph["cwsearch.stages.scan.stage"]
    assert _floor("cwsearch.job.pipeline") > _floor("cwsearch.stages.scan.stage")


def test_function_local_imports_are_commented_lazy_ones():
    """Imports live at module top; the exceptions are deliberately lazy heavy imports (matplotlib, numba
    factories, ptemcee, dask, the numerical code behind a command's ``run``), each under a comment."""
    uncommented = []
    for name, path in _modules().items():
        lines = path.read_text(encoding="utf-8").splitlines()
        for fn in ast.walk(ast.parse("\n".join(lines))):
            if not isinstance(fn, (ast.FunctionDef, ast.AsyncFunctionDef)):
                continue
            for node in ast.walk(fn):
                if isinstance(node, (ast.Import, ast.ImportFrom)):
                    i = node.lineno - 2
                    while i >= 0 and lines[i].strip().startswith(("from ", "import ")):
                        i -= 1  # one comment covers a block of lazy imports
                    if i < 0 or not lines[i].strip().startswith("#"):
                        uncommented.append(f"{name}:{node.lineno}: {lines[node.lineno - 1].strip()}")
    assert uncommented == []


def test_public_modules_declare_all():
    missing = []
    for name, path in _modules().items():
        if any(part.startswith("_") for part in name.split(".")[1:]) or name.endswith("__main__"):
            continue
        tree = ast.parse(path.read_text(encoding="utf-8"))
        declared = any(isinstance(n, (ast.Assign, ast.AugAssign, ast.AnnAssign)) and "__all__" in ast.unparse(n)
                       for n in tree.body)
        if not declared:
            missing.append(name)
    assert missing == []


def test_importing_the_cli_loads_no_numerical_stack():
    """``import cwsearch.cli`` (what ``cwsearch --help`` costs) pulls in no matplotlib, dask or numba."""
    code = ("import sys\nimport cwsearch.cli\n"
            "print(sorted(m for m in sys.modules if m.split('.')[0] in ('matplotlib', 'dask', 'distributed', "
            "'numba')))\n")
    env = dict(os.environ, PYTHONPATH=str(REPO))
    out = subprocess.run([sys.executable, "-c", code], cwd=REPO, env=env, capture_output=True, text=True,
                         timeout=120)
    assert out.returncode == 0, out.stderr
    assert out.stdout.strip() == "[]"


def test_stage_registry_is_in_pipeline_order():
    """One registry drives the run file, the pipeline and the CLI (README "Code map")."""
    from cwsearch.job.config import STAGES as CONFIG_STAGES
    from cwsearch.stages import STAGES

    assert [s.name for s in STAGES] == ["noise", "scan", "followup", "hosts", "limits", "targets"]
    assert tuple(s.name for s in STAGES) == CONFIG_STAGES


def test_stage_registry_and_options_load_no_numerical_stack():
    """The stage registry, every stage's options module, the noise settings and every command module import
    only the standard library (and cwsearch's own light modules): ``cwsearch COMMAND --help`` builds its
    options from the dataclasses without numpy, scipy, astropy, numba, matplotlib or dask."""
    code = ("import sys, importlib, pkgutil\nimport cwsearch.stages, cwsearch.commands\n"
            "for m in pkgutil.iter_modules(cwsearch.commands.__path__):\n"
            "    importlib.import_module('cwsearch.commands.' + m.name)\n"
            "for s in cwsearch.stages.STAGES:\n"
            "    importlib.import_module(f'cwsearch.stages.{s.name}.options')\n"
            "import cwsearch.physics.noise_settings, cwsearch.core.options\n"
            "print(sorted(m for m in sys.modules if m.split('.')[0] in ('numpy', 'scipy', 'astropy', 'numba', "
            "'matplotlib', 'dask', 'distributed', 'tqdm')))\n")
    env = dict(os.environ, PYTHONPATH=str(REPO))
    out = subprocess.run([sys.executable, "-c", code], cwd=REPO, env=env, capture_output=True, text=True,
                         timeout=120)
    assert out.returncode == 0, out.stderr
    assert out.stdout.strip() == "[]"


def test_options_modules_import_only_the_standard_library_and_core():
    """Read from the source (the check above sees only what one run imports): a stage's options.py imports
    the standard library and cwsearch.core only."""
    bad = []
    for name, path in _modules().items():
        if not (name.endswith(".options") or name == "cwsearch.physics.noise_settings"):
            continue
        for node in ast.parse(path.read_text(encoding="utf-8")).body:
            if isinstance(node, ast.Import):
                targets = [a.name for a in node.names]
            elif isinstance(node, ast.ImportFrom):
                targets = [_resolve(name, False, node)]
            else:
                continue
            for target in targets:
                top = target.split(".")[0]
                if top == "cwsearch" and not target.startswith("cwsearch.core"):
                    bad.append(f"{name}: {target}")
                elif top != "cwsearch" and top not in sys.stdlib_module_names and top != "__future__":
                    bad.append(f"{name}: {target}")
    assert bad == []
