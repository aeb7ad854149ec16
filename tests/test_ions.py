import numpy as np
import pytest

from probeseq import InputError, IonList
from probeseq.io.ions import IonMeta


def make(n=5):
    r = np.arange(n, dtype=float)
    return dict(x=r, y=r + 1, z=r + 2, mass_to_charge=r + 10)


def test_construction_validates_and_freezes():
    ions = IonList(**make())
    assert ions.n_ions == 5
    with pytest.raises(ValueError):
        ions.x[0] = 3.0  # arrays are read-only


def test_unequal_lengths_rejected():
    d = make()
    d["z"] = d["z"][:3]
    with pytest.raises(InputError, match="unequal lengths"):
        IonList(**d)


def test_nan_rejected_at_construction():
    d = make()
    d["x"] = d["x"].copy()
    d["x"][2] = np.nan
    with pytest.raises(InputError, match="NaN"):
        IonList(**d)


def test_from_arrays_drops_and_counts():
    d = make(6)
    d["x"] = d["x"].copy(); d["x"][1] = np.inf
    d["mass_to_charge"] = d["mass_to_charge"].copy(); d["mass_to_charge"][3] = -1.0
    ions = IonList.from_arrays(**d)
    assert ions.n_ions == 4
    assert ions.meta.dropped == {"non-finite": 1, "non-positive mass_to_charge": 1}
    assert ions.meta.n_dropped == 2
    with pytest.raises(InputError, match="--strict"):
        IonList.from_arrays(strict=True, **d)


def test_subset_and_concatenate_round_trip():
    ions = IonList(**make(10), meta=IonMeta(source="s"))
    parts = [ions.subset(slice(0, 4)), ions.subset(slice(4, 10))]
    joined = IonList.concatenate(parts)
    np.testing.assert_array_equal(joined.mass_to_charge, ions.mass_to_charge)
    assert joined.meta.source == "s"
