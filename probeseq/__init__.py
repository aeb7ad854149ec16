"""probeseq: read metal sequences along the rods of mixed-metal framework crystals from
atom-probe tomography ion lists.

Importing the package changes nothing in the process: thread counts and numba's threading layer
are set by :func:`probeseq.runtime.configure` (the command line's ``--jobs``), or with safe
defaults at the first use of a compiled kernel.
"""

from ._version import __version__
from .exceptions import ConvergenceWarning, DataQualityWarning, InputError, ProbeseqError
from .io.ions import IonList, IonMeta
from .lattice.model import Lattice

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
