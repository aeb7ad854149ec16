"""probeseq: read metal sequences along the rods of mixed-metal framework crystals from
atom-probe tomography ion lists."""

import os as _os
import sys as _sys

# The compiled kernels run in worker processes too (a batch of runs, experiment planning, a table
# written by a forked child). numba's GNU OpenMP layer aborts a forked child that starts a
# parallel loop, so the fork-safe 'workqueue' layer is used unless the user chose one.
if "NUMBA_THREADING_LAYER" not in _os.environ:
    _os.environ["NUMBA_THREADING_LAYER"] = "workqueue"
    if "numba" in _sys.modules:
        _sys.modules["numba"].config.THREADING_LAYER = "workqueue"

from ._version import __version__  # noqa: E402
from .exceptions import ConvergenceWarning, DataQualityWarning, InputError, ProbeseqError  # noqa: E402
from .ions import IonList, IonMeta  # noqa: E402
from .lattice import Lattice  # noqa: E402

__all__ = [
    "__version__",
    "ConvergenceWarning",
    "DataQualityWarning",
    "InputError",
    "IonList",
    "IonMeta",
    "Lattice",
    "ProbeseqError",
]
