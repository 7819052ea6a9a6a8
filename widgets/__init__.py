"""The lensrec Jupyter workbench (built on the lensrec library; all physics lives there).

In a notebook::

    from widgets import Workbench
    Workbench()
"""

from .app import Workbench
from .state import WorkbenchState

__all__ = ["Workbench", "WorkbenchState"]
