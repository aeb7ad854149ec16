"""Ion lists in and out: the :class:`~probeseq.io.ions.IonList` object (:mod:`.ions`), the
readers of CSV/TSV/TXT (:mod:`.text`) and HDF5 (:mod:`.hdf5`) files behind one
:class:`~probeseq.io.readers.IonSource`, with whole-file reading and writing (:mod:`.readers`),
and file kinds and checksums (:mod:`.formats`).
"""
