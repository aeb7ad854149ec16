"""probeseq: read metal sequences along the rods of mixed-metal framework crystals from
atom-probe tomography ion lists."""

from ._version import __version__
from .exceptions import ConvergenceWarning, DataQualityWarning, InputError, ProbeseqError
from .ions import IonList, IonMeta
from .lattice import Lattice

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
