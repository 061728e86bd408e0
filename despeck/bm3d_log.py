"""Log-domain BM3D under its first import path; the module is :mod:`despeck.filters.bm3d_log`.

Kept so that ``from despeck import bm3d_log`` goes on working; new code imports
:mod:`despeck.filters.bm3d_log`.
"""

from .filters.bm3d_log import *  # noqa: F401,F403
from .filters.bm3d_log import __all__  # noqa: F401
