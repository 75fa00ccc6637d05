"""No import cycles inside the package: the layers only import downwards.

Every module under ``kernels/`` is parsed with :mod:`ast` (nothing is
imported); its imports of ``hatkernels`` modules, at the top and inside
functions alike, make the edges of a graph.  ``from hatkernels.x import y``
is an edge to ``hatkernels.x.y`` when that is a module, else to
``hatkernels.x``; relative imports are resolved the same way.  Imports under
``if TYPE_CHECKING:`` never run and are left out.  The parent packages an
import runs on the way (``hatkernels/__init__.py`` for every one) are not
edges: every module would otherwise sit in one cycle through the package's
``__init__``, which imports the public names from all of them.
"""

import ast
import pathlib

import pytest

ROOT = pathlib.Path(__file__).resolve().parents[1] / "kernels"
PACKAGE = "hatkernels"

def module_name(path, root=ROOT):
    parts = (PACKAGE,) + path.relative_to(root).with_suffix("").parts
    return ".".join(parts[:-1] if parts[-1] == "__init__" else parts)


def modules(root=ROOT):
    """``{name: path}`` of every module of the package whose source folder is ``root``."""
    return {module_name(p, root): p for p in sorted(root.rglob("*.py"))}


def _is_type_checking(test):
    return (isinstance(test, ast.Name) and test.id == "TYPE_CHECKING") or (
        isinstance(test, ast.Attribute) and test.attr == "TYPE_CHECKING"
    )


def _walk_running(tree):
    """Every node of ``tree`` except the bodies of ``if TYPE_CHECKING:``."""
    stack = [tree]
    while stack:
        node = stack.pop()
        yield node
        if isinstance(node, ast.If) and _is_type_checking(node.test):
            stack.extend(node.orelse)
            continue
        stack.extend(ast.iter_child_nodes(node))


def imports_of(name, path, known):
    """The package's modules that module ``name`` (file ``path``) imports, anywhere in it."""
    is_package = path.name == "__init__.py"
    here = name if is_package else name.rpartition(".")[0]
    found = set()
    for node in _walk_running(ast.parse(path.read_text(), filename=str(path))):
        if isinstance(node, ast.Import):
            for alias in node.names:
                found.add(alias.name)
        elif isinstance(node, ast.ImportFrom):
            if node.level:
                base = here.split(".")
                base = base[: len(base) - (node.level - 1)]
                target = ".".join(base + ([node.module] if node.module else []))
            else:
                target = node.module
            for alias in node.names:
                sub = f"{target}.{alias.name}"
                found.add(sub if sub in known else target)
        elif (
            isinstance(node, ast.Call)
            and getattr(node.func, "attr", getattr(node.func, "id", None)) == "import_module"
            and node.args
            and isinstance(node.args[0], ast.Constant)
            and isinstance(node.args[0].value, str)
        ):
            found.add(node.args[0].value)
    return {m for m in found if m in known and m != name} | ({name} & found)


def import_graph(root=ROOT):
    known = modules(root)
    return {name: imports_of(name, path, known) for name, path in known.items()}


def strongly_connected(graph):
    """Tarjan's algorithm, iterative: the components of more than one module, or with a self-loop.

    (R. Tarjan, Depth-first search and linear graph algorithms, SIAM J.
    Computing 1(2), 1972.)
    """
    index, low, on_stack, stack, out = {}, {}, set(), [], []
    counter = 0
    for start in sorted(graph):
        if start in index:
            continue
        work = [(start, iter(sorted(graph[start])))]
        index[start] = low[start] = counter
        counter += 1
        stack.append(start)
        on_stack.add(start)
        while work:
            v, children = work[-1]
            for w in children:
                if w not in index:
                    index[w] = low[w] = counter
                    counter += 1
                    stack.append(w)
                    on_stack.add(w)
                    work.append((w, iter(sorted(graph[w]))))
                    break
                if w in on_stack:
                    low[v] = min(low[v], index[w])
            else:
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
                    if len(comp) > 1 or v in graph[v]:
                        out.append(sorted(comp))
    return out


def a_cycle(graph, component):
    """One cycle through the first module of ``component``, as a list that returns to its start."""
    inside = set(component)
    start = component[0]
    parent = {start: None}
    queue = [start]
    while queue:
        v = queue.pop(0)
        for w in sorted(graph[v] & inside):
            if w == start:
                path = [v]  # back from v to start through the search tree
                while parent[path[-1]] is not None:
                    path.append(parent[path[-1]])
                return path[::-1] + [start]
            if w not in parent:
                parent[w] = v
                queue.append(w)
    raise AssertionError(f"no cycle through {start} in {component}")


def describe(graph, components):
    return "\n".join(
        f"  {' -> '.join(a_cycle(graph, c))}   (component: {', '.join(c)})" for c in components
    )


# -- the checker itself, on small graphs with known answers --


def test_finds_a_cycle_and_prints_it():
    g = {"a": {"b"}, "b": {"c"}, "c": {"a"}, "d": {"a"}, "e": {"e"}}
    comps = strongly_connected(g)
    assert comps == [["a", "b", "c"], ["e"]]
    assert a_cycle(g, ["a", "b", "c"]) == ["a", "b", "c", "a"]
    assert a_cycle(g, ["e"]) == ["e", "e"]
    assert strongly_connected({"a": {"b"}, "b": set()}) == []


def test_reads_lazy_relative_and_submodule_imports(tmp_path):
    pkg = tmp_path / "kernels"
    (pkg / "sub").mkdir(parents=True)
    (pkg / "__init__.py").write_text("")
    (pkg / "sub" / "__init__.py").write_text("from .low import thing\n")
    (pkg / "sub" / "low.py").write_text(
        "def f():\n    from hatkernels.sub import high\n"
        "from typing import TYPE_CHECKING\nif TYPE_CHECKING:\n    import hatkernels.top\n"
    )
    (pkg / "sub" / "high.py").write_text("from hatkernels.sub.low import thing\n")
    (pkg / "top.py").write_text("import hatkernels.sub\n")
    g = import_graph(pkg)
    assert g == {
        "hatkernels": set(),
        "hatkernels.sub": {"hatkernels.sub.low"},
        "hatkernels.sub.low": {"hatkernels.sub.high"},  # lazy; TYPE_CHECKING left out
        "hatkernels.sub.high": {"hatkernels.sub.low"},
        "hatkernels.top": {"hatkernels.sub"},
    }
    assert strongly_connected(g) == [["hatkernels.sub.high", "hatkernels.sub.low"]]


# -- the package --


def test_the_graph_sees_the_package():
    g = import_graph()
    assert "hatkernels.mesh.core" in g["hatkernels.mesh"]
    assert "hatkernels.mesh.core" in g["hatkernels.operators"] or any(
        "hatkernels.mesh.core" in g[m] for m in g if m.startswith("hatkernels.operators.")
    )


def test_no_import_cycle():
    g = import_graph()
    cycles = strongly_connected(g)
    if not cycles:
        return
    pytest.fail("import cycles:\n" + describe(g, cycles))


def test_the_checker_finds_a_lazy_cycle(tmp_path):
    pkg = tmp_path / "kernels"
    pkg.mkdir()
    (pkg / "__init__.py").write_text("")
    (pkg / "cli.py").write_text("from hatkernels import mesh\n")
    (pkg / "mesh.py").write_text("def f():\n    import hatkernels.cli\n")
    g = import_graph(pkg)
    cycles = strongly_connected(g)
    assert cycles == [["hatkernels.cli", "hatkernels.mesh"]]
    assert "hatkernels.cli -> hatkernels.mesh -> hatkernels.cli" in describe(g, cycles)


if __name__ == "__main__":
    graph = import_graph()
    print(describe(graph, strongly_connected(graph)) or "no import cycle")
