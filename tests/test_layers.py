"""The package's structure: no charflow import inside a function, no import cycle.

The rule is the project's layering rule (DEVELOPERS.md, "Layers"; issue 13, "One clear
structure"): a module imports only from its own layer or the layers below it, at its top, and
never inside a function to dodge a cycle. `lint-imports` checks the layers' order
(pyproject.toml, [tool.importlinter]); these tests check the two halves it does not see: an
import hidden in a function body, and a cycle between modules of one layer.
"""

from __future__ import annotations

import ast
from pathlib import Path

import grimp

PACKAGE = Path(__file__).resolve().parents[1] / "charflow"

# Third-party modules a function may import where it needs them: each loads slowly or needs
# a system library or an optional extra, and only that function uses it. A new one goes here
# with its reason.
IN_FUNCTION = {
    "PySpice": "loads libngspice; only the shared backend needs it (simulation.backends)",
    "joblib": "its parallel loop, only where the report draws its maps (analysis.report)",
    "distributed": "the optional [cluster] extra (execution.cluster)",
    "liberty": "the optional [diff] extra's parser (analysis.diff)",
    "matplotlib": "seconds to import; only the plots need it (analysis.diff)",
}


def _imports_in_functions(path: Path) -> list[tuple[int, str]]:
    """(line, module) of every import inside a function body of ``path``, at any depth."""
    found = []
    for node in ast.walk(ast.parse(path.read_text(), str(path))):
        if not isinstance(node, ast.FunctionDef | ast.AsyncFunctionDef):
            continue
        for inner in ast.walk(node):
            if isinstance(inner, ast.Import):
                found += [(inner.lineno, alias.name) for alias in inner.names]
            elif isinstance(inner, ast.ImportFrom):
                # A relative import (level > 0) is one of charflow's own.
                name = "charflow." + (inner.module or "") if inner.level else inner.module or ""
                found.append((inner.lineno, name))
    return sorted(set(found))


def _all_in_functions() -> list[tuple[str, int, str]]:
    return [
        (str(path.relative_to(PACKAGE.parent)), line, name)
        for path in sorted(PACKAGE.rglob("*.py"))
        for line, name in _imports_in_functions(path)
    ]


def test_no_charflow_import_inside_a_function():
    # The cli's lazy bindings, shared.deferred("charflow.x") at a module's top, are calls, not
    # imports: they pass.
    hidden = [f"{f}:{line} imports {name}" for f, line, name in _all_in_functions()]
    hidden = [h for h in hidden if h.split(" imports ")[1].split(".")[0] == "charflow"]
    assert not hidden, "import these at the module's top:\n" + "\n".join(hidden)


def test_imports_inside_functions_are_the_listed_third_party_ones():
    unlisted = [
        f"{f}:{line} imports {name}"
        for f, line, name in _all_in_functions()
        if name.split(".")[0] not in {"charflow", *IN_FUNCTION}
    ]
    assert not unlisted, (
        "import these at the module's top, or add them to IN_FUNCTION with the reason:\n"
        + "\n".join(unlisted)
    )


def test_the_checks_see_an_import_inside_a_function(tmp_path):
    # The walk itself, on a module written for it: nested and relative imports count, an
    # import at the top and a call that names a module do not.
    sample = tmp_path / "sample.py"
    sample.write_text(
        "import numpy\n"
        "def f():\n"
        "    import charflow.records.points\n"
        "    def g():\n"
        "        from ..tables import gaps\n"
        "    return deferred('charflow.flow.characterize')\n"
        "class C:\n"
        "    def m(self):\n"
        "        from joblib import Parallel\n"
    )
    assert _imports_in_functions(sample) == [
        (3, "charflow.records.points"),
        (5, "charflow.tables"),
        (9, "joblib"),
    ]


def _cycles(graph: grimp.ImportGraph) -> list[tuple[str, ...]]:
    """One chain per direct import a -> b where b leads back to a."""
    found = []
    for importer in sorted(graph.modules):
        for imported in sorted(graph.find_modules_directly_imported_by(importer)):
            if imported != importer and graph.chain_exists(imported, importer):
                back = graph.find_shortest_chain(imported, importer)
                found.append((importer, *(back or ())))
    return found


def test_no_import_cycle_between_charflow_modules():
    cycles = _cycles(grimp.build_graph("charflow"))
    assert not cycles, "import cycles:\n" + "\n".join(" -> ".join(c) for c in cycles)


def test_the_cycle_check_sees_a_cycle():
    # The check itself, on a graph with one cycle a -> b -> c -> a and one edge outside it.
    graph = grimp.ImportGraph()
    for importer, imported in (("p.a", "p.b"), ("p.b", "p.c"), ("p.c", "p.a"), ("p.d", "p.a")):
        graph.add_import(importer=importer, imported=imported)
    assert {frozenset(c) for c in _cycles(graph)} == {frozenset({"p.a", "p.b", "p.c"})}
