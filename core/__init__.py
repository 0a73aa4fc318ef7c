"""Modescope's computation library: the mean-centred truncated SVD of an image collection.

No Qt and no front end here; scripts and notebooks use the public API re-exported below::

    from modescope.core import AnalysisOptions, analyze, save_model
    result = analyze(["frames/"], AnalysisOptions(rank=20))
    save_model("frames.npz", result.decomposition)

Stages (one sub-package each, in the order the data flows): ``sources`` (scan and decode),
``engine`` (streaming SVD, refinement passes, block cache, the analyse/update pipeline),
``review`` (limits and outlier scores, near-duplicates, ranks, marks, accuracy), ``output``
(model file, atomic writing, export), ``demo`` (the invented demo collections).
"""

from modescope.core.decomposition import Decomposition, fix_signs
from modescope.core.engine.pipeline import (AnalysisOptions, AnalysisResult, Progress,
                                            analyze, load_analysis_image, project_images, scan,
                                            update_analysis, version)
from modescope.core.errors import (AnalysisCancelled, ModelFileError, ModescopeError,
                                   NoUsableImagesError, SourceError)
from modescope.core.output.model_file import load_model, save_model
from modescope.core.review.accuracy import describe_accuracy
from modescope.core.review.check import CheckResult, check_images, score_columns
from modescope.core.review.duplicates import find_duplicates
from modescope.core.review.dynamics import dynamics_of
from modescope.core.review.frequencies import frequencies_of
from modescope.core.review.outliers import score_table
from modescope.core.sources.scan import SourceSet, scan_sources

__all__ = [
    "Decomposition", "fix_signs",
    "AnalysisOptions", "AnalysisResult", "Progress", "analyze", "update_analysis", "scan",
    "load_analysis_image", "project_images", "version",
    "ModescopeError", "SourceError", "NoUsableImagesError", "ModelFileError",
    "AnalysisCancelled",
    "load_model", "save_model",
    "describe_accuracy", "find_duplicates", "score_table",
    "CheckResult", "check_images", "score_columns",
    "frequencies_of", "dynamics_of",
    "SourceSet", "scan_sources",
]
