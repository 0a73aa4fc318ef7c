"""The public API of modescope.core, and the examples in its docstrings."""

from __future__ import annotations

import doctest
import importlib
import pkgutil

import numpy as np

import modescope.core as core


def test_public_api_is_reexported_and_works(tmp_path):
    for name in core.__all__:
        assert getattr(core, name) is not None, name
    # a tiny end-to-end run through the re-exported names only
    from PIL import Image
    rng = np.random.default_rng(0)
    for i in range(12):
        Image.fromarray(rng.integers(0, 256, (6, 5), dtype=np.uint8)).save(tmp_path / f"{i}.png")
    result = core.analyze([tmp_path], core.AnalysisOptions(rank=3))
    path = core.save_model(tmp_path / "m.npz", result.decomposition)
    back = core.load_model(path)
    np.testing.assert_array_equal(back.singular_values, result.decomposition.singular_values)
    np.testing.assert_array_equal(back.singular_value_error,
                                  result.decomposition.singular_value_error)


def test_docstring_examples_run():
    # every example written in a core docstring runs and prints what it says
    failures, attempted, modules = 0, 0, []
    for info in pkgutil.walk_packages(core.__path__, "modescope.core."):
        module = importlib.import_module(info.name)
        result = doctest.testmod(module, optionflags=doctest.ELLIPSIS | doctest.NORMALIZE_WHITESPACE,
                                 verbose=False, report=True)
        failures += result.failed
        attempted += result.attempted
        if result.attempted:
            modules.append(info.name)
    assert failures == 0
    assert attempted >= 5 and len(modules) >= 4, modules
