"""JSON for results: numpy values made plain, NaN and inf written as null (JSON has no NaN)."""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np

__all__ = ["plain"]


def plain(v):
    """``v`` with numpy scalars and arrays turned into Python ones, non-finite floats into None.

    Dict keys are kept; objects JSON cannot hold (paths, other types) become strings.
    """
    if isinstance(v, dict):
        return {k: plain(x) for k, x in v.items()}
    if isinstance(v, (list, tuple)):
        return [plain(x) for x in v]
    if isinstance(v, np.ndarray):
        return plain(v.tolist())
    if isinstance(v, (bool, np.bool_)):
        return bool(v)
    if isinstance(v, (int, np.integer)):
        return int(v)
    if isinstance(v, (float, np.floating)):
        return float(v) if math.isfinite(v) else None
    if v is None or isinstance(v, str):
        return v
    if isinstance(v, Path):
        return str(v)
    return str(v)
