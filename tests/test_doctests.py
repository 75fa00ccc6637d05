"""The docstrings' examples run against the installed ``hatkernels``.

They run here rather than through ``--doctest-modules``: collecting the
source folder by path would import it a second time under its folder's name
(``kernels``), and the project promises one copy of the library per process.
"""

import doctest
import importlib
import pkgutil

import pytest
from _pytest.doctest import _get_checker  # pytest's checker: it knows NUMBER

import hatkernels

# NUMBER (pytest's flag): floats match to the precision the example writes
OPTIONS = doctest.NORMALIZE_WHITESPACE | doctest.register_optionflag("NUMBER")

MODULES = sorted(
    ["hatkernels"]
    + [info.name for info in pkgutil.walk_packages(hatkernels.__path__, "hatkernels.")]
)


@pytest.mark.parametrize("name", MODULES)
def test_docstring_examples(name):
    module = importlib.import_module(name)
    report = []
    runner = doctest.DocTestRunner(checker=_get_checker(), optionflags=OPTIONS)
    for test in doctest.DocTestFinder(exclude_empty=True).find(module, name):
        if test.filename and not test.filename.startswith(hatkernels.__path__[0]):
            continue  # examples of objects imported from elsewhere
        runner.run(test, out=report.append)
    assert runner.failures == 0, "".join(report)


def test_examples_exist():
    # a finder that silently found nothing would make the test above pass
    found = sum(len(doctest.DocTestFinder(exclude_empty=True).find(
        importlib.import_module(name), name)) for name in MODULES)
    assert found >= 30
