"""The ``nightbank`` command line: one Typer app, commands grouped in small modules.

Errors are handled in one place, :class:`CommandGroup`: a :class:`models.NightbankError` (every
service error builds on it) raised by any command is printed with its code and message, without
traceback, and the command exits with the error's ``exit_code`` (see :mod:`service.errors`):
0 success, 1 failure (invalid input, refused request, part of the work failed), 2 invalid
settings or options (as for click's usage errors).
"""

from __future__ import annotations

from .application import CommandGroup, app

__all__ = ["CommandGroup", "app"]

# each command module registers its commands on ``app`` when imported, in this order
from . import data as _data  # noqa: E402, F401, I001
from . import demo as _demo  # noqa: E402, F401
from . import remote as _remote  # noqa: E402, F401
from . import server as _server  # noqa: E402, F401
from . import tokens as _tokens  # noqa: E402, F401
from . import scoring as _scoring  # noqa: E402, F401
from . import compare as _compare  # noqa: E402, F401
from . import manage as _manage  # noqa: E402, F401
from . import profiles as _profiles  # noqa: E402, F401
from . import recordings as _recordings  # noqa: E402, F401
from . import protocol as _protocol  # noqa: E402, F401
from . import reviews as _reviews  # noqa: E402, F401
