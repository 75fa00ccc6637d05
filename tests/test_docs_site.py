"""The documentation site: every public name is in the API reference, every guide is a page.

The reference is checked through the inventory Sphinx writes (``objects.inv``,
the list of every object a page describes, which other sites link against).
``.ci/run`` builds the site once with warnings as errors and points
``HATKERNELS_DOCS_BUILD`` at it; without that variable this module builds the
site itself (about half a minute), or skips when the ``docs`` extra is not
installed.  With the variable set, a missing build fails: CI must not skip.
"""

import importlib
import importlib.util
import inspect
import os
import pathlib
import re
import subprocess
import sys
import types
import zlib

import pytest

import hatkernels

DOCS = pathlib.Path(__file__).resolve().parents[1] / "docs"
PUBLIC = ["hatkernels", "hatkernels.mesh", "hatkernels.krylov", "hatkernels.precond",
          "hatkernels.norms", "hatkernels.distributed", "hatkernels.io"]


def read_inventory(path):
    """``{name: (role, uri)}`` of a Sphinx inventory, version 2 (four header lines, then
    zlib-compressed lines ``name domain:role priority uri display-name``)."""
    data = path.read_bytes()
    lines = data.split(b"\n", 4)
    assert lines[0] == b"# Sphinx inventory version 2", f"{path}: not a version 2 inventory"
    entries = {}
    for line in zlib.decompress(lines[4]).decode("utf-8").splitlines():
        m = re.match(r"(.+?)\s+(\S+:\S+)\s+(-?\d+)\s+(\S*)\s+(.*)$", line)
        assert m, f"{path}: unreadable line {line!r}"
        name, role, _, uri, _ = m.groups()
        if uri.endswith("$"):
            uri = uri[:-1] + name
        entries.setdefault(name, (role, uri))
    return entries


@pytest.fixture(scope="module")
def site(tmp_path_factory):
    """The built site's directory."""
    given = os.environ.get("HATKERNELS_DOCS_BUILD")
    if given:
        out = pathlib.Path(given)
        assert (out / "objects.inv").is_file(), (
            f"HATKERNELS_DOCS_BUILD={given} has no objects.inv: the documentation build "
            "did not run or failed")
        return out
    missing = [m for m in ("sphinx", "numpydoc", "myst_parser") if importlib.util.find_spec(m) is None]
    if missing:
        pytest.skip(f"the docs extra is not installed ({', '.join(missing)} missing): "
                    "pip install -e '.[docs]', or set HATKERNELS_DOCS_BUILD to a built site")
    out = tmp_path_factory.mktemp("docs") / "html"
    # the same command as .ci/run and DEVELOPERS.md
    run = subprocess.run([sys.executable, "-m", "sphinx", "-W", "--keep-going", "-n", "-q",
                          "-j", "auto", "-b", "html", "-d", str(out.parent / "doctrees"),
                          str(DOCS), str(out)], capture_output=True, text=True, timeout=600)
    assert run.returncode == 0, f"the documentation build failed:\n{run.stderr[-6000:]}"
    return out


@pytest.fixture(scope="module")
def inventory(site):
    entries = read_inventory(site / "objects.inv")
    assert len(entries) > 100, f"only {len(entries)} objects in the inventory"
    return entries


def public_names():
    names = []
    for module_name in PUBLIC:
        module = importlib.import_module(module_name)
        names += [(f"{module_name}.{name}", getattr(module, name)) for name in module.__all__]
    return names


def expected_roles(obj):
    if isinstance(obj, types.ModuleType):
        return {"py:module"}
    if inspect.isclass(obj):
        return {"py:exception"} if issubclass(obj, BaseException) else {"py:class"}
    if inspect.isfunction(obj):
        return {"py:function"}
    return {"py:data"}


def test_every_public_name_is_in_the_reference(inventory):
    names = public_names()
    assert len(names) >= len(hatkernels.__all__) > 30
    missing = [name for name, _ in names if name not in inventory]
    assert not missing, (f"{len(missing)} public names are not in the API reference (add each "
                         f"to its layer's page in docs/api/): {', '.join(missing)}")


def test_each_name_is_described_as_what_it_is(inventory):
    # a class described as a function, or a constant as a class, would mislead the reader
    wrong = [f"{name} is {inventory[name][0]}, expected {' or '.join(sorted(expected_roles(obj)))}"
             for name, obj in public_names()
             if name in inventory and inventory[name][0] not in expected_roles(obj)]
    assert not wrong, "; ".join(wrong)


def test_the_reference_is_on_the_layer_pages(inventory):
    # hatkernels.mesh.Mesh and the like (a second name of an object described in full
    # under its first) are entries too, on the same pages
    outside = [f"{name} -> {inventory[name][1]}" for name, _ in public_names()
               if name in inventory and not inventory[name][1].startswith("api/")]
    assert not outside, f"public names described outside docs/api/: {outside}"


def test_every_guide_is_a_page_with_its_figures(site, inventory):
    guides = sorted(p.stem for p in DOCS.glob("*.md"))
    assert {"index", "user-guide", "architecture", "performance"} <= set(guides)
    pages = {name for name, (role, _) in inventory.items() if role == "std:doc"}
    assert not set(guides) - pages, f"guides missing from the site: {set(guides) - pages}"
    for guide in guides:
        html = (site / f"{guide}.html").read_text(encoding="utf-8")
        for image in re.findall(r"\]\((images/[^)\s]+)\)", (DOCS / f"{guide}.md").read_text()):
            name = pathlib.PurePosixPath(image).name
            assert (site / "_images" / name).is_file(), f"{guide}: {image} was not copied"
            assert f"_images/{name}" in html, f"{guide}.html does not show {image}"
