"""Notch-comb baseline: IIR notches at the stimulation harmonics.

What many labs use today, kept for comparison. Each harmonic ``k f`` below
``max_freq`` gets a second-order IIR notch (``scipy.signal.iirnotch``) of
bandwidth ``bandwidth_hz``, applied forward and backward (zero phase) to the
whole trace.

What it removes and what it cannot
----------------------------------
It removes a band ``bandwidth_hz`` wide around each harmonic, neural signal
included, everywhere in the trace (sham and off stretches too). It leaves
the heartbeat and respiration sidebands outside those bands, harmonics above
``max_freq`` and the DAC staircase in the spike band, and it rings after
ramps and steps.
"""

from __future__ import annotations

import numpy as np
from scipy import signal

from .base import ArtifactEstimator

__all__ = ["NotchComb"]


class NotchComb(ArtifactEstimator):
    """Zero-phase IIR notches at every stimulation harmonic below ``max_freq``.

    Parameters
    ----------
    max_freq : float
        Highest harmonic notched (Hz); 300 Hz is where the spike band starts
        (common practice).
    bandwidth_hz : float
        -3 dB width of each notch.
    """

    _method_name = "comb"
    # tracemalloc peaks of fit_transform, 20 Hz, 1 and 4 channels x 20 s (session 17)
    memory_per_sample = (3.1, 0.0)

    def __init__(self, max_freq: float = 300.0, bandwidth_hz: float = 1.0):
        self.max_freq = max_freq
        self.bandwidth_hz = bandwidth_hz

    context_cycles = 0.0

    def context_seconds(self, freq_hz: float) -> float:
        # an IIR notch's transient decays as exp(-pi * bandwidth * t) (pole radius 1 - pi bw / fs):
        # ln(1e9) time constants leave a piece edge 1e-9 of the artifact
        return float(np.log(1e9) / (np.pi * self.bandwidth_hz))

    def _validate_params(self) -> None:
        if not self.max_freq > 0:
            raise ValueError(f"max_freq must be positive, got {self.max_freq!r}")
        if not self.bandwidth_hz > 0:
            raise ValueError(f"bandwidth_hz must be positive, got {self.bandwidth_hz!r}")

    def sos(self, freq: float, fs: float) -> np.ndarray:
        """Second-order sections of the comb for stimulation frequency ``freq``."""
        top = min(self.max_freq, 0.45 * fs)
        harmonics = np.arange(1, int(top // freq) + 1) * freq
        if harmonics.size == 0:
            return np.zeros((0, 6))
        return np.vstack([signal.tf2sos(*signal.iirnotch(h, h / self.bandwidth_hz, fs=fs)) for h in harmonics])

    _prepared_attrs = ("_freq",)

    def prepare(self, read, model, fs: float, mapper=map) -> None:
        """Take the notch frequency from the whole recording's main block (file pieces call this),
        so pieces without a block of their own are filtered like the rest."""
        main = model.main_block
        self._freq = None if main is None else main.freq_hz

    def _estimate(self, x, fs, model, lost):
        main = model.main_block
        freq = getattr(self, "_freq", None) or (None if main is None else main.freq_hz)
        if freq is None:
            return np.zeros_like(x), dict(harmonics=0, freq_hz=None)
        sos = self.sos(freq, fs)
        if sos.shape[0] == 0:
            return np.zeros_like(x), dict(harmonics=0, freq_hz=freq)
        filtered = signal.sosfiltfilt(sos, x, axis=-1)
        return x - filtered, dict(harmonics=int(sos.shape[0]), freq_hz=freq)
