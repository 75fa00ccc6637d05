"""Packaging: the import name, the package list, one copy of the library."""

import pathlib
import sys

import pytest

import hatkernels

tomllib = pytest.importorskip("tomllib")  # Python 3.11+

ROOT = pathlib.Path(__file__).resolve().parents[1]


def test_every_subpackage_is_listed_in_pyproject():
    config = tomllib.loads((ROOT / "pyproject.toml").read_text())["tool"]["setuptools"]
    assert config["package-dir"] == {"hatkernels": "kernels"}
    on_disk = {
        ".".join(("hatkernels",) + p.parent.relative_to(ROOT / "kernels").parts)
        for p in (ROOT / "kernels").rglob("__init__.py")
    }
    assert set(config["packages"]) == on_disk


def test_one_copy_of_the_library():
    # the source folder is named kernels/; importing it by that name would load
    # a second, independent copy (its own registries, caches and classes)
    assert "kernels" not in sys.modules
    home = pathlib.Path(hatkernels.__file__).resolve().parent
    for name, module in list(sys.modules.items()):
        if name == "hatkernels" or name.startswith("hatkernels."):
            where = getattr(module, "__file__", None)
            if where:
                assert pathlib.Path(where).resolve().is_relative_to(home), name


def _modules():
    return sorted((ROOT / "kernels").rglob("*.py"))


def test_modules_stay_short():
    # the design keeps each module under 500 lines: split by idea beyond that
    long = {str(p.relative_to(ROOT)): n for p in _modules()
            if (n := len(p.read_text().splitlines())) >= 500}
    assert not long


def test_no_layer_names_a_preconditioner():
    # drivers ask the registry (capabilities, context); only precond/ and the
    # command's option parsing may name one.  Defaults of parameters are the
    # documented contract (preconditioner="amg") and are allowed.
    import ast

    names = set(hatkernels.PRECONDITIONERS)
    found = []
    for path in _modules():
        rel = path.relative_to(ROOT / "kernels")
        if rel.parts[0] in ("precond", "cli"):
            continue
        tree = ast.parse(path.read_text())
        defaults = set()
        for node in ast.walk(tree):
            if isinstance(node, (ast.FunctionDef, ast.AsyncFunctionDef, ast.Lambda)):
                for d in node.args.defaults + [d for d in node.args.kw_defaults if d]:
                    defaults.add(id(d))
        for node in ast.walk(tree):
            if (isinstance(node, ast.Constant) and isinstance(node.value, str)
                    and node.value in names and id(node) not in defaults):
                found.append(f"{rel}:{node.lineno}: {node.value!r}")
    assert not found, "\n".join(found)
