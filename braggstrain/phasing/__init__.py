"""Phase retrieval for Bragg coherent diffraction imaging.

Entry points: :func:`reconstruct` (one random start) and :func:`ensemble`
(many starts, ranked, aligned and averaged).  The plan of stages is plain
data (:class:`PhasingStage`, :func:`plan_from_config`, :func:`default_plan`) that a
pipeline TOML file can hold.  See docs/phasing.md.
"""

from braggstrain.phasing.fft import FFTBackend, default_threads, export_wisdom, import_wisdom, load_wisdom, save_wisdom
from braggstrain.phasing.schedule import PhasingStage, default_plan, options_from_config, plan_from_config, plan_to_config
from braggstrain.phasing.coherence import CoherenceSettings
from braggstrain.phasing.engine import History, Metrics, OversamplingWarning, Reconstruction, reconstruct
from braggstrain.phasing.ensemble import EnsembleResult, RunSummary, ensemble
from braggstrain.phasing.metrics import PRTF, align, complex_error, prtf, twin

__all__ = [
    "reconstruct",
    "ensemble",
    "Reconstruction",
    "EnsembleResult",
    "RunSummary",
    "History",
    "Metrics",
    "PhasingStage",
    "default_plan",
    "plan_from_config",
    "plan_to_config",
    "options_from_config",
    "CoherenceSettings",
    "OversamplingWarning",
    "PRTF",
    "prtf",
    "align",
    "complex_error",
    "twin",
    "FFTBackend",
    "default_threads",
    "export_wisdom",
    "import_wisdom",
    "save_wisdom",
    "load_wisdom",
]
