"""afterfit: check and improve a linear regression model as a guided loop.

``Study`` is the headless object; ``explore`` shows the notebook workbench for one.
Submodules load on first use, so the kernel works without a front end.
"""
from __future__ import annotations

__all__ = ["Study", "explore", "demo", "__version__"]
__version__ = "0.1.0"


def explore(df, formula=None, **keywords):
    """Show the workbench; returns the Explorer widget (its Study is ``explorer.study``).

    ``explore(df, "y ~ x + C(g)", **keywords)`` builds ``Study(df, formula, **keywords)``;
    ``explore(study)`` shows an existing Study (e.g. one restored with ``Study.load``).
    """
    from afterfit.model.study import Study
    from afterfit.view.explorer import Explorer

    if isinstance(df, Study):
        if formula is not None or keywords:
            raise TypeError("explore(study) takes no formula or options: the Study has them")
        return Explorer(df)
    if formula is None:
        raise TypeError("explore() needs a formula, e.g. explore(df, 'y ~ x'), or a Study")
    return Explorer(Study(df, formula, **keywords))


def __getattr__(name):
    if name == "Study":
        from afterfit.model.study import Study

        return Study
    if name == "demo":
        import importlib

        return importlib.import_module("afterfit.demo")
    raise AttributeError(f"module 'afterfit' has no attribute {name!r}")
