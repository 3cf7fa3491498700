"""Every example in the docstrings of stimsteer runs and prints what it says (doctest, Python standard library)."""

import doctest
import importlib
import pkgutil

import pytest

import stimsteer.control
import stimsteer.sysid


def _modules():
    names = []
    for pkg in (stimsteer.sysid, stimsteer.control):
        names.append(pkg.__name__)
        names += [m.name for m in pkgutil.walk_packages(pkg.__path__, prefix=pkg.__name__ + ".")]
    return sorted(names)


def _examples(module_name):
    module = importlib.import_module(module_name)
    finder = doctest.DocTestFinder(exclude_empty=True)
    return [t for t in finder.find(module, module_name) if t.examples and t.name.startswith(module_name)]


MODULES = _modules()


def test_the_docstrings_hold_examples():
    # a guard on the collection itself: if the walk finds no examples, the parametrised test below proves nothing
    assert sum(len(t.examples) for name in MODULES for t in _examples(name)) >= 50


@pytest.mark.parametrize("module_name", MODULES)
def test_docstring_examples_run(module_name):
    runner = doctest.DocTestRunner(optionflags=doctest.ELLIPSIS | doctest.NORMALIZE_WHITESPACE)
    for test in _examples(module_name):
        runner.run(test)
    result = runner.summarize(verbose=False)
    assert result.failed == 0, f"{result.failed} of {result.attempted} docstring examples failed in {module_name}"
