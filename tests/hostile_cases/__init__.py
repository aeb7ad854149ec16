"""Hostile-input sweep of the probeseq command line.

The package has four parts:

* :mod:`.base` makes the small, valid data every case starts from (a simulated run folder, a
  columns folder and an analysis folder), once per session;
* :mod:`.builders` turns a case's recipe into an input tree on disk (malformed ion files, range
  and lattice files, run folders, damaged output folders);
* :mod:`.cases` lists the cases: named hostile inputs crossed with the commands that read them,
  option values, output paths that point at inputs, and seeded random mutations;
* :mod:`.harness` runs one case in a worker process with a wall-time limit and checks what the
  user would see: a one-line error (never a traceback or an internal error), inputs unchanged,
  outputs complete or absent, no staging folders left behind.

``tests/test_hostile_sweep.py`` runs a deterministic subset under pytest;
``tests/benchmarks/sweep_hostile.py`` runs every case and prints a table per command.
"""

from .cases import Case, all_cases, pytest_subset
from .harness import Outcome, Runner, run_case

__all__ = ["Case", "all_cases", "pytest_subset", "Outcome", "Runner", "run_case"]
