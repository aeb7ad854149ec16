"""What an analysis writes: the output folder and its ownership (:mod:`.folder`), the tables and
files of an analysis folder and their readers (:mod:`.results`), CSV writing (:mod:`.tables`),
figures (:mod:`.figures`, sequence tracks in :mod:`.tracks`), the HTML report (:mod:`.report`)
and exports of a finished analysis (:mod:`.export`).
"""
