"""The probeseq package has no import cycle, and the command-line modules depend one way.

Every module of the package is parsed with ``ast`` (nothing is imported) and the imports of one
probeseq module by another become the edges of a graph. Two kinds of edge are told apart:

* module-level imports (the module's top level, also inside ``try``/``if`` blocks there, but not
  under ``if TYPE_CHECKING:``) run while the module is being imported. A cycle of these is a
  real defect: which module is complete first depends on which one a caller imports first, and
  a name taken from the other one may not exist yet. These edges must form no cycle.
* imports inside a function or method run only when it is called, when every module involved is
  fully imported, so they cannot leave a module half-initialised; many are there on purpose, to
  keep start-up fast. They are collected and listed (``-s`` prints them) but do not count as
  cycles. The one-way rule of the command-line layer is checked on them separately: the stage
  commands and the library never import the command-line entry point, at any level.

Cycles are found with Tarjan's strongly connected components; a failure names every edge of
each cycle with the file and line of the import.
"""

import ast
from pathlib import Path

import pytest

PACKAGE = "probeseq"
ROOT = Path(__file__).resolve().parents[1] / PACKAGE


def _module_name(path: Path) -> str:
    rel = path.relative_to(ROOT.parent).with_suffix("")
    parts = list(rel.parts)
    if parts[-1] == "__init__":
        parts = parts[:-1]
    return ".".join(parts)


def _modules() -> dict:
    return {_module_name(p): p for p in sorted(ROOT.rglob("*.py"))}


def _resolve(module: str, is_package: bool, node: ast.ImportFrom) -> str:
    """The absolute module named by a ``from ... import`` statement."""
    if node.level == 0:
        return node.module or ""
    base = module.split(".") if is_package else module.split(".")[:-1]
    base = base[: len(base) - (node.level - 1)]
    return ".".join(base + ([node.module] if node.module else []))


def _is_type_checking(test: ast.expr) -> bool:
    return (isinstance(test, ast.Name) and test.id == "TYPE_CHECKING") or (
        isinstance(test, ast.Attribute) and test.attr == "TYPE_CHECKING")


def _imports(module: str, path: Path, known: set):
    """(target, line, module_level) for every import of a probeseq module by ``module``."""
    tree = ast.parse(path.read_text(encoding="utf-8"), filename=str(path))
    is_package = path.name == "__init__.py"
    found = []

    def targets(node):
        if isinstance(node, ast.Import):
            for alias in node.names:
                if alias.name.split(".")[0] == PACKAGE:
                    yield alias.name
        elif isinstance(node, ast.ImportFrom):
            base = _resolve(module, is_package, node)
            for alias in node.names:
                sub = f"{base}.{alias.name}"
                yield sub if sub in known else base

    def visit(node, module_level: bool):
        for child in ast.iter_child_nodes(node):
            if isinstance(child, (ast.Import, ast.ImportFrom)):
                for t in sorted(set(targets(child))):
                    if t in known and t != module:
                        found.append((t, child.lineno, module_level))
            elif isinstance(child, (ast.FunctionDef, ast.AsyncFunctionDef, ast.Lambda)):
                visit(child, False)
            elif isinstance(child, ast.If) and _is_type_checking(child.test):
                for stmt in child.orelse:
                    visit(ast.Module(body=[stmt], type_ignores=[]), module_level)
            else:
                visit(child, module_level)

    visit(tree, True)
    return found


@pytest.fixture(scope="module")
def graph():
    mods = _modules()
    known = set(mods)
    edges = {}  # (a, b) -> [(file, line, module_level)]
    for name, path in mods.items():
        for target, line, top in _imports(name, path, known):
            edges.setdefault((name, target), []).append((path.relative_to(ROOT.parent).as_posix(), line, top))
    return mods, edges


def _strongly_connected(nodes, adjacency) -> list:
    """Tarjan's algorithm (iterative); components of more than one node, or with a self-edge."""
    index, low, on_stack, stack, out = {}, {}, set(), [], []
    counter = [0]
    for root in sorted(nodes):
        if root in index:
            continue
        work = [(root, iter(sorted(adjacency.get(root, ()))))]
        index[root] = low[root] = counter[0]
        counter[0] += 1
        stack.append(root)
        on_stack.add(root)
        while work:
            v, it = work[-1]
            advanced = False
            for w in it:
                if w not in index:
                    index[w] = low[w] = counter[0]
                    counter[0] += 1
                    stack.append(w)
                    on_stack.add(w)
                    work.append((w, iter(sorted(adjacency.get(w, ())))))
                    advanced = True
                    break
                if w in on_stack:
                    low[v] = min(low[v], index[w])
            if advanced:
                continue
            work.pop()
            if work:
                low[work[-1][0]] = min(low[work[-1][0]], low[v])
            if low[v] == index[v]:
                comp = []
                while True:
                    w = stack.pop()
                    on_stack.discard(w)
                    comp.append(w)
                    if w == v:
                        break
                if len(comp) > 1 or v in adjacency.get(v, ()):
                    out.append(sorted(comp))
    return out


def test_tarjan_finds_a_planted_cycle_and_nothing_in_a_tree():
    adj = {"a": {"b"}, "b": {"c"}, "c": {"a", "d"}, "d": set(), "e": {"d"}}
    assert _strongly_connected(adj, adj) == [["a", "b", "c"]]
    adj = {"a": {"b", "c"}, "b": {"c"}, "c": set()}
    assert _strongly_connected(adj, adj) == []


def test_the_parser_sees_both_kinds_of_import(graph):
    mods, edges = graph
    assert "probeseq.cli.stages" in mods and "probeseq.study.batch" in mods
    # module level: the stage commands take app from the shared module; function level: the entry
    # point loads the stage commands
    assert any(top for _, _, top in edges[("probeseq.cli.stages", "probeseq.cli.common")])
    assert not any(top for _, _, top in edges[("probeseq.cli.main", "probeseq.cli.stages")])
    assert any(top for _, _, top in edges[("probeseq", "probeseq.lattice.model")])


def test_no_import_cycle_at_module_level(graph):
    mods, edges = graph
    adj = {}
    for (a, b), where in edges.items():
        if any(top for _, _, top in where):
            adj.setdefault(a, set()).add(b)
    cycles = _strongly_connected(mods, adj)
    lines = []
    for comp in cycles:
        lines.append("cycle among " + ", ".join(comp) + ":")
        for (a, b), where in sorted(edges.items()):
            if a in comp and b in comp:
                lines += [f"  {a} -> {b} ({f}:{ln})" for f, ln, top in where if top]
    assert not cycles, "\n".join(lines)


def test_function_level_imports_are_listed(graph):
    _, edges = graph
    deferred = sorted(f"{a} -> {b} ({f}:{ln})" for (a, b), where in edges.items() for f, ln, top in where
                      if not top)
    print(f"{len(deferred)} function-level imports (not cycles):")
    print("\n".join(deferred))
    assert deferred  # the package does defer imports; an empty list means the parser missed them


def test_command_line_layer_depends_one_way(graph):
    mods, edges = graph
    # nothing imports the entry point module, at any level, but the command-line package's face
    # and ``python -m probeseq``
    into_main = sorted(f"{a} ({f}:{ln})" for (a, b), where in edges.items() if b == "probeseq.cli.main"
                       and a not in ("probeseq.__main__", "probeseq.cli") for f, ln, _ in where)
    assert into_main == []
    # the library (batch included) never imports a command-line module
    cli_modules = {m for m in mods if m == "probeseq.cli" or m.startswith("probeseq.cli.")}
    library = set(mods) - cli_modules - {"probeseq.__main__"}
    up = sorted(f"{a} -> {b}" for (a, b) in edges if a in library and b in cli_modules)
    assert up == []
    assert not any(b == "probeseq.cli.main" for (a, b) in edges if a == "probeseq.cli.common")


#: The stages from the ground up. A module may import modules of its own subpackage and of any
#: subpackage on a lower floor, never one above: data flow one way, and a newcomer reads the house
#: from the bottom (the contributor guide's architecture table has the same order).
FLOORS = [
    {"exceptions", "_version", "runtime", "utils"},
    {"io"},
    {"ranging"},
    {"lattice"},
    {"decoding"},
    {"statistics"},
    {"outputs", "simulation"},
    {"pipeline"},
    {"study"},
    {"cli"},
    {"__main__"},
]


def _part(module: str) -> str:
    parts = module.split(".")
    return parts[1] if len(parts) > 1 else ""


def test_every_part_of_the_package_has_a_floor(graph):
    mods, _ = graph
    placed = set().union(*FLOORS)
    assert sorted({_part(m) for m in mods} - placed - {""}) == []


def test_stages_import_only_downward(graph):
    """No import, at any level (deferred ones too), reaches a subpackage on a higher floor or a
    different subpackage on the same floor."""
    floor = {name: i for i, names in enumerate(FLOORS) for name in names}
    _, edges = graph
    up = []
    for (a, b), where in sorted(edges.items()):
        pa, pb = _part(a), _part(b)
        if a == "probeseq" or pa == pb:
            continue  # the package's face lists its public names from wherever they live
        if floor[pb] > floor[pa] or (floor[pb] == floor[pa] and pa != pb and floor[pa] != 0):
            up += [f"{a} -> {b} ({f}:{ln})" for f, ln, _ in where]
    assert up == [], "imports that run upward:\n" + "\n".join(up)
