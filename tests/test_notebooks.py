"""The example notebooks are committed clean and all run in the default test command.

pytest collects ``example_notebooks/*.ipynb`` itself: ``--nbval-lax`` is in pyproject's
``addopts``, so nbval runs every notebook top to bottom in a fresh kernel and fails on any cell
that raises.  The cells hold their own assertions (the refit from exported code equals the
Study's parameters, cross-validated error falls over the steps, a saved Study loads back the
same).  ``large_data.ipynb`` works on 10^6 rows (about a minute on two cores).  This file checks
what nbval does not: that notebooks are committed without outputs and that nbval is on.
"""
from __future__ import annotations

import pathlib

import nbformat
import pytest

HERE = pathlib.Path(__file__).resolve().parent.parent / "example_notebooks"
NAMES = sorted(p.name for p in HERE.glob("*.ipynb"))


def test_the_three_notebooks_are_there():
    assert {"tour.ipynb", "orchard.ipynb", "large_data.ipynb"} <= set(NAMES)


@pytest.mark.parametrize("name", NAMES)
def test_notebook_is_committed_without_outputs(name):
    nb = nbformat.read(str(HERE / name), as_version=4)
    assert all(not c.get("outputs") and c.get("execution_count") is None
               for c in nb.cells if c.cell_type == "code"), f"{name} has outputs: clear them"


def test_notebooks_run_in_the_default_command(pytestconfig):
    # the default command is plain ``python -m pytest``: pyproject must switch nbval on
    assert pytestconfig.getoption("nbval_lax", default=False), \
        "pyproject addopts lost --nbval-lax: the example notebooks would not run"
