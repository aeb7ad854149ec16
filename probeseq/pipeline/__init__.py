"""The one pipeline: the stage functions (:mod:`.stages`: range, count, decode), their options and
typed result (:mod:`.options`) and the whole analysis of an ion list or file, written to an
output folder (:mod:`.analysis`).
"""

from .analysis import analyze, analyze_file, write_analysis
from .options import AnalysisOptions, AnalysisResult
from .stages import CountResult, count_file, count_ions, decode_stage, pool_copies, range_file

__all__ = ["AnalysisOptions", "AnalysisResult", "CountResult", "analyze", "analyze_file", "count_file",
           "count_ions", "decode_stage", "pool_copies", "range_file", "write_analysis"]
