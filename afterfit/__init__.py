"""afterfit: check and improve a linear regression model as a guided loop.

``Study`` is the headless object; ``explore`` shows the notebook workbench for one.
Widget modules are imported lazily so the kernel works without a front end.
"""
from __future__ import annotations

from afterfit import demo
from afterfit.model.study import Study

__all__ = ["Study", "explore", "demo", "__version__"]
__version__ = "0.1.0"


def explore(df, formula, **keywords):
    """Show the workbench for ``Study(df, formula, **keywords)``; returns the Explorer widget.

    The Study is available as ``explorer.study``.
    """
    from afterfit.view.explorer import Explorer

    return Explorer(Study(df, formula, **keywords))
