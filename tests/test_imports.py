"""The import graph of moerun: no cycles, and the run-time modules never reach the offline tools.

Every module under moerun/ is parsed with ``ast`` (not imported), and every import statement counts, inside
functions or not, relative or absolute: ``from . import x`` depends on the submodule ``moerun.x`` when there is
one, on the package's ``__init__`` otherwise (``from . import __version__``).  Importing a submodule also runs
its package's ``__init__``; that implicit step is how packages work and is not counted as an edge.
The layering is described in docs/design/architecture.md (data flow).
"""

from __future__ import annotations

import ast
from pathlib import Path

import moerun

ROOT = Path(moerun.__file__).resolve().parent
PACKAGE = "moerun"

# The layering, as rules over directories (docs/design/architecture.md, section 1).  What a decode needs:
RUNTIME = ("moerun.model", "moerun.files", "moerun.runtime", "moerun.policies")
# Shared leaves every layer may use.
LEAVES = ("moerun.errors", "moerun.units", "moerun._version")
# The offline tools: they make, score, measure or study models and traces, and may use the runtime;
# the runtime never uses them.
OFFLINE = ("moerun.sim", "moerun.planner", "moerun.prober", "moerun.makers", "moerun.checks", "moerun.api")
# The command line: parses, calls the library, renders; nothing else imports it.
CLI = ("moerun.cli", "moerun.__main__")


def _under(name: str, roots) -> bool:
    return any(name == r or name.startswith(r + ".") for r in roots)


def module_files() -> dict[str, Path]:
    """Dotted module name -> file, for every .py under the package (``__init__`` names the package itself)."""
    out = {}
    for path in sorted(ROOT.rglob("*.py")):
        parts = [PACKAGE, *path.relative_to(ROOT).with_suffix("").parts]
        if parts[-1] == "__init__":
            parts = parts[:-1]
        out[".".join(parts)] = path
    return out


def imported_modules(name: str, path: Path, known: set[str]) -> set[str]:
    """The moerun modules one file imports, anywhere in it (``known``: every module of the package)."""
    package = name.split(".") if path.name == "__init__.py" else name.split(".")[:-1]
    found: set[str] = set()
    for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"), str(path))):
        if isinstance(node, ast.Import):
            found.update(alias.name for alias in node.names)
        elif isinstance(node, ast.ImportFrom):
            if node.level:
                base = ".".join(package[: len(package) - (node.level - 1)] + ([node.module] if node.module else []))
            else:
                base = node.module or ""
            for alias in node.names:
                sub = f"{base}.{alias.name}"
                found.add(sub if sub in known else base)  # a submodule, or a name from the module itself
    found.discard(name)
    return found & known


def import_graph() -> dict[str, set[str]]:
    """Module -> the moerun modules it imports."""
    files = module_files()
    known = set(files)
    return {name: imported_modules(name, path, known) for name, path in files.items()}


def find_cycle(graph: dict[str, set[str]]) -> list[str] | None:
    """One cycle as [a, b, ..., a], or None (depth-first search with the path on a stack)."""
    state: dict[str, int] = {}  # 1 on the current path, 2 finished
    for start in sorted(graph):
        if state.get(start):
            continue
        stack = [(start, iter(sorted(graph[start])))]
        path = [start]
        state[start] = 1
        while stack:
            node, children = stack[-1]
            child = next(children, None)
            if child is None:
                stack.pop()
                path.pop()
                state[node] = 2
            elif state.get(child) == 1:
                return path[path.index(child):] + [child]
            elif not state.get(child):
                state[child] = 1
                path.append(child)
                stack.append((child, iter(sorted(graph[child]))))
    return None


def reachable(graph: dict[str, set[str]], start: str) -> dict[str, str]:
    """Every module reachable from ``start``, each with the module that first imported it (for a readable chain)."""
    via = {start: ""}
    todo = [start]
    while todo:
        node = todo.pop()
        for child in sorted(graph[node]):
            if child not in via:
                via[child] = node
                todo.append(child)
    return via


def _chain(via: dict[str, str], end: str) -> str:
    out = [end]
    while via[out[-1]]:
        out.append(via[out[-1]])
    return " -> ".join(reversed(out))


def test_the_parser_sees_imports_inside_functions_relative_and_absolute(tmp_path):
    # the checker itself, on a file made for it: every kind of import statement is an edge
    src = (
        "import moerun.files.store\n"
        "from moerun.files.codec import Codec\n"
        "from .. import policies\n"
        "from ..units import fmt_bytes\n"
        "def f():\n"
        "    from ..makers.quantize import quantize_model\n"
        "    from .. import __version__\n"
    )
    path = tmp_path / "probe_me.py"  # as if it were moerun/runtime/probe_me.py
    path.write_text(src)
    known = {"moerun", "moerun.files.store", "moerun.files.codec", "moerun.policies", "moerun.units", "moerun.makers.quantize"}
    got = imported_modules("moerun.runtime.probe_me", path, known)
    assert got == known
    assert find_cycle({"a": {"b"}, "b": {"c"}, "c": {"a"}}) == ["a", "b", "c", "a"]
    assert find_cycle({"a": {"b"}, "b": set(), "c": {"a", "b"}}) is None


def test_no_module_imports_one_that_imports_it_back():
    graph = import_graph()
    assert len(graph) > 40, "the package was not found"
    cycle = find_cycle(graph)
    assert cycle is None, "import cycle: " + " -> ".join(cycle)


def test_run_time_subpackages_never_reach_the_offline_tools_or_the_command_line():
    graph = import_graph()
    runtime = [m for m in graph if _under(m, RUNTIME + LEAVES)]
    assert len(runtime) > 20, "the run-time subpackages were not found"
    for name in runtime:
        via = reachable(graph, name)
        bad = sorted(m for m in via if _under(m, OFFLINE + CLI) or m == PACKAGE)
        assert not bad, f"{name} reaches beyond the runtime: " + "; ".join(_chain(via, m) for m in bad)


def test_nothing_outside_the_command_line_imports_it():
    graph = import_graph()
    for name, deps in graph.items():
        if _under(name, CLI):
            continue
        bad = sorted(d for d in deps if _under(d, CLI))
        assert not bad, f"{name} imports the command line: {bad}"


def test_no_module_of_the_library_imports_the_top_level_package():
    # moerun/__init__.py is for users: it gathers the public names, so a module that imported it would
    # import the whole library (and, for a run-time module, the offline tools)
    graph = import_graph()
    bad = sorted(name for name, deps in graph.items() if PACKAGE in deps and not _under(name, CLI))
    assert not bad, f"these import the top-level package instead of the module that owns the name: {bad}"


def test_private_modules_are_imported_only_from_their_own_subpackage():
    graph = import_graph()
    for name, deps in graph.items():
        for dep in deps:
            parts = dep.split(".")
            if parts[-1].startswith("_") and not parts[-1].startswith("__") and dep != "moerun._version":
                home = ".".join(parts[:-1])
                assert _under(name, (home,)), f"{name} imports {dep}, private to {home}"


def test_every_subpackage_declares_its_public_names():
    for init in sorted(ROOT.rglob("__init__.py")):
        tree = ast.parse(init.read_text(encoding="utf-8"))
        names = [t.id for node in tree.body if isinstance(node, ast.Assign) for t in node.targets if isinstance(t, ast.Name)]
        assert "__all__" in names, f"{init.relative_to(ROOT.parent)} has no __all__"
