"""emicase's numerical engine: traces in, calibrated spectra, peaks, harmonic
families, source attribution, limit margins and signatures out.

Plain numpy/scipy. This package never imports Django, Celery or emicase
(tests/analysis/test_layering.py keeps that wall up).
"""

from analysis.errors import TraceError
from analysis.types import (
    Attribution,
    Exceedance,
    Family,
    Peak,
    Source,
    Spectrum,
    Term,
    TimeRecord,
    Trace,
)

__version__ = "0.1.0"

__all__ = [
    "Attribution",
    "Exceedance",
    "Family",
    "Peak",
    "Source",
    "Spectrum",
    "Term",
    "TimeRecord",
    "Trace",
    "TraceError",
    "__version__",
]
