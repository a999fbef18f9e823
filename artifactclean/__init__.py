"""artifactclean: remove alternating-current stimulation artifacts and measure what cleaning does.

Main entry points
-----------------
clean
    ``clean(data, fs, stim_freq=..., method=...)``: a cleaned copy of an array.
fit_stimulation, StimulationModel
    Stimulation blocks, frequency, drift and the phase of every sample.
TemplateSubtraction, HarmonicRegression, CyclePCA, AdaptiveCanceller, NotchComb
    Estimator objects with scikit-learn conventions (methods "template",
    "regression", "pca", "adaptive", "comb").
simulate_recording
    Synthetic contaminated recordings with ground truth (demo, tests, benchmarks).
"""

from ._version import __version__
from .api import clean
from .estimators import (DEFAULT_METHOD, METHODS, AdaptiveCanceller, CyclePCA, HarmonicRegression, NotchComb,
                         TemplateSubtraction, make_estimator)
from .stimulation import StimulationModel, fit_stimulation, estimate_tone
from .synthetic import simulate_recording

__all__ = [
    "__version__",
    "clean",
    "METHODS",
    "DEFAULT_METHOD",
    "AdaptiveCanceller",
    "CyclePCA",
    "HarmonicRegression",
    "NotchComb",
    "TemplateSubtraction",
    "make_estimator",
    "StimulationModel",
    "fit_stimulation",
    "estimate_tone",
    "simulate_recording",
]
