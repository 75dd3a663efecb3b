"""The runnable examples in qtally's docstrings still give the output they show."""

import doctest
import importlib
import pkgutil

import pytest

import qtally

MODULES = sorted(
    name
    for _, name, _ in pkgutil.walk_packages(qtally.__path__, "qtally.")
    if not name.endswith("policy_model_code") and not name.startswith("qtally.configs")
)


@pytest.mark.parametrize("module_name", MODULES)
def test_examples(module_name):
    module = importlib.import_module(module_name)
    failures, _ = doctest.testmod(module, optionflags=doctest.ELLIPSIS | doctest.NORMALIZE_WHITESPACE)
    assert failures == 0
