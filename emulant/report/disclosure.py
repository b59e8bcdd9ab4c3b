"""The report's name for :mod:`emulant.disclosure`, the one disclosure rule of the project.

Kept so that ``from emulant.report import disclosure`` reads as before; the rule itself lives in
:mod:`emulant.disclosure`, which every stage (extract check, logs, archive, command line) calls.
"""

from emulant.disclosure import *  # noqa: F403
from emulant.disclosure import SECONDARY  # noqa: F401  (a name used by the report)
