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
