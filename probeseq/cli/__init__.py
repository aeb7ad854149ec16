"""The command line: the application and its shared helpers (:mod:`.common`), the entry point with
``simulate`` and ``inspect`` (:mod:`.main`) and the other commands (:mod:`.stages`). A thin layer
over the library: parse, call, write, summarise.
"""

from .main import app, main, run

__all__ = ["app", "main", "run"]
