"""The package's layers: every import (those inside functions included) goes to the same layer
or a lower one, and no module imports itself back through others.

A consistency test of the code's structure (nothing outside the project to compare with). The
layer table is the one DEVELOPERS.md describes; a new folder or top-level module must be given
a layer here.
"""

from __future__ import annotations

import ast
from pathlib import Path

import networkx as nx

import trophoscape

PACKAGE = Path(trophoscape.__file__).parent

#: Lowest first. A module may import from its own layer or any layer below it.
LAYERS = (
    ("errors", "columns", "machine"),  # messages, names and the cores every layer shares
    ("model",),  # landscape, network, local dynamics, the coupled system, shocks
    ("scenario", "testing"),  # the scenario file, read against the model's tables
    ("integrate",),  # ODE solver, event-based engine, noise, replicates
    ("analysis",),  # pure functions of a trajectory and the network
    ("io",),  # file formats and the staged output folder
    ("workflows",),  # study, planning, spread, sweep, worker tasks
    ("report",),  # figures, the HTML report, each command's whole folder
    ("cli", "__main__"),  # argument parsing, printing, exit codes
)
RANK = {name: i for i, names in enumerate(LAYERS) for name in names}


def _module_name(path: Path) -> str:
    parts = list(path.relative_to(PACKAGE.parent).with_suffix("").parts)
    if parts[-1] == "__init__":
        parts = parts[:-1]
    return ".".join(parts)


def _imports(path: Path, name: str, modules: set[str]) -> set[str]:
    """Modules of the package that ``path`` imports, anywhere in the file."""
    tree = ast.parse(path.read_text(encoding="utf-8"))
    package = name.split(".") if path.name == "__init__.py" else name.split(".")[:-1]
    found = set()
    for node in ast.walk(tree):
        if isinstance(node, ast.Import):
            targets = [a.name for a in node.names]
        elif isinstance(node, ast.ImportFrom):
            if node.level:
                base = package[: len(package) - (node.level - 1)]
                base = ".".join(base + ([node.module] if node.module else []))
            else:
                base = node.module or ""
            targets = [f"{base}.{a.name}" if f"{base}.{a.name}" in modules else base
                       for a in node.names]
        else:
            continue
        for t in targets:
            while t and t not in modules and "." in t:
                t = t.rsplit(".", 1)[0]
            if t in modules and t != name:
                found.add(t)
    return found


def _graph() -> nx.DiGraph:
    # modules of the package: files in folders with an __init__.py (the installed demo data
    # folder holds the scripts that made it, which are no part of the package)
    files = [p for p in PACKAGE.rglob("*.py")
             if all((folder / "__init__.py").is_file()
                    for folder in [p.parent, *p.parent.parents][:len(p.relative_to(PACKAGE).parts)])]
    names = {_module_name(p): p for p in files}
    graph = nx.DiGraph()
    graph.add_nodes_from(names)
    for name, path in names.items():
        graph.add_edges_from((name, t) for t in _imports(path, name, set(names)))
    return graph


def _layer(module: str) -> str | None:
    parts = module.split(".")
    return parts[1] if len(parts) > 1 else None  # None: the package's own __init__


def test_every_module_has_a_layer():
    unplaced = {_layer(m) for m in _graph()} - set(RANK) - {None}
    assert not unplaced, f"give these a layer in LAYERS (and DEVELOPERS.md): {unplaced}"


def test_no_import_cycle():
    cycles = list(nx.simple_cycles(_graph()))
    assert cycles == [], f"import cycles: {cycles[:5]}"


def test_imports_only_go_down_the_layers():
    upward = []
    for a, b in _graph().edges:
        la, lb = _layer(a), _layer(b)
        if la is None:
            upward.append((a, b))  # the package's __init__ loads its exports lazily
        elif lb is not None and RANK[lb] > RANK[la]:
            upward.append((a, b))
    assert upward == [], f"imports from a higher layer: {upward}"


def test_the_checks_see_imports_inside_functions(tmp_path):
    # the import graph counts an import written inside a function (the checks above would miss
    # hidden cycles otherwise)
    cli_main = PACKAGE / "cli" / "program.py"
    assert "trophoscape.report.run" in _imports(cli_main, "trophoscape.cli.program",
                                                set(_graph().nodes))
    source = cli_main.read_text(encoding="utf-8")
    assert "    from ..report.run import run_to_folder" in source  # inside _dispatch


def test_every_public_name_exists():
    # consistency test: the package's public API (its __all__, loaded lazily) and every
    # module's __all__ name things that exist
    import importlib
    import pkgutil

    for name in trophoscape.__all__:
        assert getattr(trophoscape, name) is not None, name
    for info in pkgutil.walk_packages(trophoscape.__path__, "trophoscape."):
        if info.name.endswith("__main__"):
            continue
        module = importlib.import_module(info.name)
        missing = [n for n in getattr(module, "__all__", ()) if not hasattr(module, n)]
        assert missing == [], (info.name, missing)


#: Names a module exports for readers and extenders although no other file uses them yet: the
#: model's vocabulary (growth forms, responses, shock kinds) and the types of public results.
EXPORTED_FOR_USERS = {
    "trophoscape.model.dynamics": {"StrongAllee", "LotkaVolterra", "HollingII", "HollingIII",
                                   "BeddingtonDeAngelis"},
    "trophoscape.model.shocks": {"Rewire"},
    "trophoscape.analysis.stability": {"Equilibrium"},
    "trophoscape.workflows.sweep": {"SweepRun"},
}


def test_module_exports_are_curated():
    # consistency test: a name in a module's __all__ is used by another module, a test, a
    # benchmark or the documentation, or is listed above; otherwise it is not exported
    import re

    repo = Path(__file__).resolve().parents[1]
    texts = {p: p.read_text(encoding="utf-8") for p in [
        *PACKAGE.rglob("*.py"), *(repo / "tests").glob("*.py"),
        *(repo / "benchmarks").glob("*.py"), *repo.glob("*.md"), *(repo / "docs").glob("*.md")]}
    unused = []
    for path in sorted(PACKAGE.rglob("*.py")):
        if path.name == "__init__.py":
            continue
        module = "trophoscape." + ".".join(path.relative_to(PACKAGE).with_suffix("").parts)
        names = []
        for node in ast.parse(texts[path]).body:
            target = (node.targets[0] if isinstance(node, ast.Assign) else
                      node.target if isinstance(node, ast.AugAssign) else None)
            if isinstance(target, ast.Name) and target.id == "__all__":
                names += ast.literal_eval(node.value)
        for name in set(names) - EXPORTED_FOR_USERS.get(module, set()):
            word = re.compile(rf"\b{re.escape(name)}\b")
            if not any(word.search(text) for p, text in texts.items() if p != path):
                unused.append(f"{module}.{name}")
    assert unused == []
