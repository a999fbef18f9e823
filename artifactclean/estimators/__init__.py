"""Artifact estimators and the registry of method names used by :func:`artifactclean.clean`."""

from .adaptive import AdaptiveCanceller
from .base import ArtifactEstimator, validate_recording
from .comb import NotchComb
from .pca import CyclePCA
from .regression import HarmonicRegression
from .template import TemplateSubtraction

#: method name -> estimator class
METHODS = {
    "template": TemplateSubtraction,
    "comb": NotchComb,
    "regression": HarmonicRegression,
    "pca": CyclePCA,
    "adaptive": AdaptiveCanceller,
}

#: what :func:`artifactclean.clean` uses when no method is named
DEFAULT_METHOD = "template"


def make_estimator(method: str, **params) -> ArtifactEstimator:
    """Build the estimator registered as ``method`` with ``params``.

    Raises
    ------
    ValueError
        For an unknown method name or a parameter the estimator does not take.
    """
    if not isinstance(method, str) or method not in METHODS:
        raise ValueError(f"unknown method {method!r}; choose one of {sorted(METHODS)}")
    cls = METHODS[method]
    valid = cls().get_params()
    unknown = sorted(set(params) - set(valid))
    if unknown:
        raise ValueError(f"method {method!r} takes no parameter(s) {unknown}; it takes {sorted(valid)}")
    return cls(**params)


__all__ = ["AdaptiveCanceller", "ArtifactEstimator", "CyclePCA", "HarmonicRegression", "NotchComb", "TemplateSubtraction", "METHODS", "DEFAULT_METHOD",
           "make_estimator", "validate_recording"]
