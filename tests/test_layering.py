"""Dependency direction and the shape of the code.

`models` imports only numpy, scipy and the standard library (STYLE.md sec. 2.1): each models
module is imported in a fresh interpreter, so nothing that another test imported can hide a
forbidden import. Every module of both packages sits on a floor (FLOORS, lowest first); no
module imports from a floor above its own, and no chain of imports, at module level or inside
a function, comes back to where it started.
"""
from __future__ import annotations

import ast
import json
import pkgutil
import subprocess
import sys
from pathlib import Path

import pytest

import models
import optimise

REPO = Path(__file__).resolve().parents[1]
FORBIDDEN = ("optimise", "pymoo", "pandas", "matplotlib")
MODELS = ["models"] + sorted(info.name for info in pkgutil.walk_packages(models.__path__, "models."))

# Lowest first. A module belongs to the longest entry its dotted name starts with; "models"
# holds the top modules (evaluate, summary), "optimise" only the package's constants.
FLOORS = ["models.numerics", "models.devices", "models.circuit", "models.stages", "models.amplifier", "models",
          "optimise", "optimise.files", "optimise.search", "optimise.review", "optimise.report",
          "optimise.spice", "optimise.calibrate", "optimise.sweep", "optimise.cli"]
MAX_LINES = 450
MAX_MODULES = 10

PROBE = """
import importlib, json, sys
importlib.import_module(sys.argv[1])
forbidden = sys.argv[2].split(",")
print(json.dumps(sorted(m for m in sys.modules if m.split(".")[0] in forbidden)))
"""


def _sources() -> dict[str, Path]:
    """Dotted module name -> file, for every module of models and optimise."""
    out = {}
    for top in ("models", "optimise"):
        for path in sorted((REPO / top).rglob("*.py")):
            parts = list(path.relative_to(REPO).with_suffix("").parts)
            if parts[-1] == "__init__":
                parts.pop()
            out[".".join(parts)] = path
    return out


SOURCES = _sources()


def floor(module: str) -> int:
    best = max((f for f in FLOORS if module == f or module.startswith(f + ".")), key=len)
    if best == "optimise" and module != "optimise":
        raise AssertionError(f"{module} sits on no floor: add its folder to FLOORS")
    return FLOORS.index(best)


def imports_of(module: str) -> set[str]:
    """Every models/optimise module `module` imports, anywhere in its file."""
    path = SOURCES[module]
    package = module if path.name == "__init__.py" else module.rpartition(".")[0]
    found = set()
    for node in ast.walk(ast.parse(path.read_text(), str(path))):
        if isinstance(node, ast.Import):
            targets = [a.name for a in node.names]
        elif isinstance(node, ast.ImportFrom):
            base = package.split(".")
            if node.level:
                base = base[: len(base) - node.level + 1]
                target = ".".join(base + ([node.module] if node.module else []))
            else:
                target = node.module
            # `from pkg import mod` names a module; `from mod import name` a name in it
            targets = [f"{target}.{a.name}" if f"{target}.{a.name}" in SOURCES else target for a in node.names]
        else:
            continue
        found |= {t for t in targets if t in SOURCES and t != module}
    return found


GRAPH = {m: imports_of(m) for m in SOURCES}


@pytest.fixture(scope="module")
def probes():
    """Start one fresh interpreter per module, all at once (each takes about 0.3 s)."""
    procs = {
        module: subprocess.Popen(
            [sys.executable, "-c", PROBE, module, ",".join(FORBIDDEN)],
            cwd=REPO, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
        )
        for module in MODELS
    }
    results = {}
    for module, proc in procs.items():
        out, err = proc.communicate(timeout=120)
        results[module] = (proc.returncode, out, err)
    return results


@pytest.mark.parametrize("module", MODELS)
def test_models_module_imports_no_outer_layer(module, probes):
    returncode, out, err = probes[module]
    assert returncode == 0, err
    loaded = json.loads(out.strip().splitlines()[-1])
    assert loaded == [], f"importing {module} loads {', '.join(loaded)}; models may use numpy, scipy and the standard library only"


def test_every_module_is_found():
    # the walk above and the file list agree, so no module escapes the checks below
    assert set(MODELS) == {m for m in SOURCES if m.startswith("models")}
    assert "optimise.cli" in SOURCES and "optimise" in SOURCES and optimise.CAUTION


def upward(graph) -> list[str]:
    """Every import of a module from a floor above its own."""
    return [f"{m} (floor {FLOORS[floor(m)]}) imports {t} (floor {FLOORS[floor(t)]})"
            for m, targets in graph.items() for t in sorted(targets) if floor(t) > floor(m)]


def cycles(graph) -> list[str]:
    """Every import cycle a depth-first walk meets (a module still on the path, met again)."""
    colour, found, stack = {}, [], []

    def visit(m):
        colour[m] = "grey"
        stack.append(m)
        for t in sorted(graph.get(m, ())):
            if colour.get(t) == "grey":
                found.append(" -> ".join(stack[stack.index(t):] + [t]))
            elif t not in colour:
                visit(t)
        stack.pop()
        colour[m] = "black"

    for m in sorted(graph):
        if m not in colour:
            visit(m)
    return found


def test_no_module_imports_from_a_floor_above_its_own():
    found = upward(GRAPH)
    assert found == [], "\n".join(found)


def test_no_import_cycles():
    found = cycles(GRAPH)
    assert found == [], "\n".join(found)


def test_the_checks_see_a_planted_cycle_and_an_upward_import():
    # the same walks on a graph with one fault of each kind planted, so the two tests above can fail
    planted = {m: set(t) for m, t in GRAPH.items()}
    planted["optimise.review.compare"].add("optimise.review.compare_render")
    planted["optimise.review.compare_render"].add("optimise.review.compare")
    planted["optimise.files.study"].add("optimise.cli")
    assert upward(planted) == [
        "optimise.files.study (floor optimise.files) imports optimise.cli (floor optimise.cli)"]
    assert any("optimise.review.compare -> optimise.review.compare_render -> optimise.review.compare" in c
               for c in cycles(planted))
    assert "optimise.search.nsga" in GRAPH["optimise.search.runner"]  # relative imports are resolved


def test_modules_and_folders_stay_small():
    long = [f"{p.relative_to(REPO)}: {n} lines" for p in SOURCES.values()
            if (n := len(p.read_text().splitlines())) > MAX_LINES]
    assert long == [], f"split these by concept (at most {MAX_LINES} lines):\n" + "\n".join(long)
    crowded = [f"{d.relative_to(REPO)}: {n} modules" for d in {p.parent for p in SOURCES.values()}
               if (n := len([f for f in d.glob("*.py") if f.name != "__init__.py"])) > MAX_MODULES]
    assert crowded == [], f"group these into sub-folders (at most {MAX_MODULES} modules):\n" + "\n".join(crowded)


def test_every_folder_says_what_lives_there():
    folders = {p.parent for p in SOURCES.values()}
    missing = [str(d.relative_to(REPO)) for d in folders if not (d / "__init__.py").is_file()]
    assert missing == [], "every folder is a package with an __init__.py: " + ", ".join(missing)
    bare = [str(p.relative_to(REPO)) for p in SOURCES.values()
            if p.name == "__init__.py" and not ast.get_docstring(ast.parse(p.read_text()))]
    assert bare == [], "each folder's __init__.py opens with what lives there and who may import it: " + ", ".join(bare)
