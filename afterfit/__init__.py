"""afterfit: check and improve a linear regression model as a guided loop.

``Study`` is the headless object; ``explore`` shows the notebook workbench for one.
Submodules load on first use, so the kernel works without a front end.
"""
from __future__ import annotations

__all__ = ["Study", "explore", "demo", "__version__"]
__version__ = "0.1.0"


def explore(df, formula, **keywords):
    """Show the workbench for ``Study(df, formula, **keywords)``; returns the Explorer widget.

    The Study is available as ``explorer.study``.
    """
    from afterfit.model.study import Study
    from afterfit.view.explorer import Explorer

    return Explorer(Study(df, formula, **keywords))


def __getattr__(name):
    if name == "Study":
        from afterfit.model.study import Study

        return Study
    if name == "demo":
        import importlib

        return importlib.import_module("afterfit.demo")
    raise AttributeError(f"module 'afterfit' has no attribute {name!r}")
