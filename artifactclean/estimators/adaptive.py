"""Adaptive cancelling with a reference: LMS-family (NLMS) and RLS filters.

The recorded trace ``d(n)`` is the artifact, a linear function of some
reference signals, plus the neural signal, which is uncorrelated with them.
An adaptive filter finds the weights ``w(n)`` that make ``w(n) . r(n)``
follow ``d(n)``, and subtracts the fit (Widrow et al. 1975, Proc IEEE
63:1692, adaptive noise cancelling; Haykin, Adaptive Filter Theory, for the
NLMS and exponentially weighted RLS recursions).

References
----------
* ``"model"``: the cosine and sine of each harmonic of the stimulation phase
  from the stimulation model (an adaptive bank of notches that follows the
  artifact's amplitude and phase);
* ``"monitor"``: a recorded stimulator monitor channel, as a tapped delay
  line of ``n_taps`` samples centred on zero lag (the filter learns the
  transfer from stimulator to electrode, DAC staircase included);
* ``"auto"`` with a monitor: both, the monitor's taps and the model's
  harmonics, in their independent directions. A stimulator's monitor is
  often a pure sine, whose taps span its fundamental only: the harmonics an
  amplifier adds stayed (0.086-0.091 x the artifact at 40 Hz, 1-30 kHz; the
  model's references alone 0.003-0.006, and both together the same), while
  a DAC staircase on the monitor is followed by its taps.

The filter is run forward and backward in time and the two fits averaged,
which cancels the lag of each direction (a recording is analysed offline).
The RLS forgetting factor follows from the tracking bandwidth: an
exponential window of ``fs / (2 pi tracking_hz)`` samples.

What it removes and what it cannot
----------------------------------
With model references it removes, around each modelled harmonic, a band
about ``tracking_hz`` wide: neural signal there goes with the artifact (no
single-channel method can separate it), and harmonics not modelled (a DAC
staircase's, above ``n_harmonics``) stay. With a monitor reference it
removes whatever is a short linear filter of the monitor; a nonlinear
amplifier response, or a monitor that misses part of the artifact, leaves a
residual. A fast forgetting factor follows fast changes but adds noise from
the short window; the RLS with a forgetting factor of 1 is the
least-squares (Wiener) solution over the whole block (tested against
``numpy.linalg.lstsq``).
"""

from __future__ import annotations

import numpy as np

from .._numeric import fractional_part
from ._kernels import HAVE_NUMBA, _jit
from .cycles import CycleEstimator, waveform_harmonics

__all__ = ["AdaptiveCanceller", "rls_filter", "nlms_filter"]


def _rls_loop(r, d, use, lam, delta, y, w):
    n, m = r.shape
    p = np.eye(m) / delta
    k = np.empty(m)
    pr = np.empty(m)
    for i in range(n):
        # prediction with the weights so far (a priori)
        acc = 0.0
        for a in range(m):
            acc += w[a] * r[i, a]
        y[i] = acc
        if use[i] == 0.0:
            continue
        den = lam
        for a in range(m):
            s = 0.0
            for b in range(m):
                s += p[a, b] * r[i, b]
            pr[a] = s
            den += r[i, a] * s
        for a in range(m):
            k[a] = pr[a] / den
        e = d[i] - acc
        for a in range(m):
            w[a] += k[a] * e
        # update the upper triangle and mirror it: P stays symmetric in floating point, which
        # keeps the recursion stable under forgetting (Haykin discusses the loss of symmetry)
        for a in range(m):
            for b in range(a, m):
                v = (p[a, b] - k[a] * pr[b]) / lam
                p[a, b] = v
                p[b, a] = v


def _nlms_loop(r, d, use, mu, eps, y, w):
    n, m = r.shape
    for i in range(n):
        acc = 0.0
        norm = eps
        for a in range(m):
            acc += w[a] * r[i, a]
            norm += r[i, a] * r[i, a]
        y[i] = acc
        if use[i] == 0.0:
            continue
        g = mu * (d[i] - acc) / norm
        for a in range(m):
            w[a] += g * r[i, a]


_rls_c = _jit(_rls_loop)
_nlms_c = _jit(_nlms_loop)


def _buffers(refs, d, use):
    """Contiguous float64 inputs and the output arrays of an adaptive filter run."""
    refs = np.ascontiguousarray(refs, dtype=np.float64)
    d = np.ascontiguousarray(d, dtype=np.float64)
    use = np.ones(d.size) if use is None else np.ascontiguousarray(use, dtype=np.float64)
    return refs, d, use, np.empty(d.size), np.zeros(refs.shape[1])


def rls_filter(refs: np.ndarray, d: np.ndarray, *, forgetting: float = 1.0, delta: float = 1e-6,
               use: np.ndarray | None = None, compiled: bool = True) -> tuple[np.ndarray, np.ndarray]:
    """Exponentially weighted RLS fit of ``d`` from ``refs`` (Haykin, Adaptive Filter Theory).

    Parameters
    ----------
    refs : ndarray, shape (n, m)
        Reference signals, one column each.
    d : ndarray, shape (n,)
        The signal to follow.
    forgetting : float
        Forgetting factor lambda in (0, 1]; 1 gives least squares over all
        samples so far.
    delta : float
        Initial inverse correlation ``P(0) = I / delta`` (a small ridge).
    use : ndarray of float, shape (n,), optional
        0 where a sample must not update the weights (lost samples).

    Returns
    -------
    y : ndarray, shape (n,)
        A-priori fit at each sample.
    w : ndarray, shape (m,)
        Final weights.
    """
    refs, d, use, y, w = _buffers(refs, d, use)
    (_rls_c if compiled and HAVE_NUMBA else _rls_loop)(refs, d, use, float(forgetting), float(delta), y, w)
    return y, w


def nlms_filter(refs: np.ndarray, d: np.ndarray, *, step: float = 0.05, eps: float = 1e-12,
                use: np.ndarray | None = None, compiled: bool = True) -> tuple[np.ndarray, np.ndarray]:
    """Normalised LMS fit of ``d`` from ``refs`` (Haykin): ``w += step e r / (eps + |r|^2)``.

    Same arguments and returns as :func:`rls_filter`; ``step`` in (0, 2).
    """
    refs, d, use, y, w = _buffers(refs, d, use)
    (_nlms_c if compiled and HAVE_NUMBA else _nlms_loop)(refs, d, use, float(step), float(eps), y, w)
    return y, w


#: a direction of the monitor's taps is kept when it holds at least this share of their largest direction's
#: energy (-80 dB; this project's choice: a DAC staircase's images at 1 kHz sit far above it, rounding far below)
_TAP_FLOOR = 1e-8


def _independent(refs: np.ndarray) -> np.ndarray:
    """The references' independent directions (``refs @ V`` over the eigenvectors of their Gram matrix that hold
    at least :data:`_TAP_FLOOR` of the largest's energy), the Gram matrix taken over the middle half of the rows:
    the monitor's steady shape, not the onsets and the padding at a block's edges, which excite other directions
    for a moment only.

    Delayed copies of a sinusoidal monitor span two dimensions whatever the taps: with a forgetting factor
    below 1, RLS's inverse correlation grows without bound along the others (the ``windup`` of exponentially
    weighted RLS; Haykin, Adaptive Filter Theory) and its output diverged, 1e3-1e5 times the artifact. The
    fit within the kept directions is the same (the filter's output is invariant to a rotation of them).
    """
    n = refs.shape[0]
    inner = refs[n // 4:n - n // 4] if n >= 4 * refs.shape[1] else refs
    gram = inner.T @ inner
    val, vec = np.linalg.eigh(gram)
    keep = val > _TAP_FLOOR * max(val[-1], 1e-300)
    return np.ascontiguousarray(refs @ vec[:, keep])


#: a harmonic of the mean cycle is modelled when its amplitude exceeds 5 times the median harmonic
#: amplitude (the noise; :func:`~artifactclean.estimators.cycles.waveform_harmonics`) and at least
#: this fraction of the fundamental's amplitude (common practice: -60 dB)
_MIN_RELATIVE = 1e-3


class AdaptiveCanceller(CycleEstimator):
    """Adaptive cancelling of the artifact from references (NLMS or RLS).

    Parameters
    ----------
    algorithm : {"rls", "nlms"}
    reference : {"auto", "model", "monitor"}
        ``"auto"`` uses the monitor channel when one is given to ``fit``
        (``stim_reference``) together with the stimulation model's
        harmonics, otherwise the harmonics alone; ``"monitor"`` the monitor
        alone.
    n_harmonics : int or None
        Harmonics modelled with ``"model"`` references; None takes those of
        the block's mean cycle that stand out of its noise (at most
        ``max_harmonics``).
    max_harmonics : int
    tracking_hz : float
        Sets the RLS forgetting factor, ``1 - 2 pi tracking_hz / fs``.
    step : float
        NLMS step size in (0, 2).
    n_taps : int
        Taps of the monitor reference (odd: centred on zero lag).
    margin_cycles : float
        Cycles beyond each block edge that are also cleaned.
    compiled : bool
        Use the numba loops (same numbers as the plain Python ones).
    """

    # filters on the samples themselves, no phase grid: nothing to gain from an upsampled copy, and the monitor
    # channel is read at the recording's own samples
    _samples_per_cycle = (0.0, 0.0)

    _method_name = "adaptive"
    # tracemalloc peaks of fit_transform, 20 Hz, 1 and 4 channels x 20 s (session 17)
    memory_per_sample = (5.0, 25.5)
    _memory_with_dac = (8.9, 44.5)
    # the plan's gain filter and DAC search are not used here
    track_amplitude = False
    dac = "off"

    def __init__(self, algorithm: str = "rls", reference: str = "auto", n_harmonics: int | None = None,
                 max_harmonics: int = 10, tracking_hz: float = 10.0, step: float = 0.05, n_taps: int = 9,
                 margin_cycles: float = 2.0, compiled: bool = True):
        self.algorithm = algorithm
        self.reference = reference
        self.n_harmonics = n_harmonics
        self.max_harmonics = max_harmonics
        self.tracking_hz = tracking_hz
        self.step = step
        self.n_taps = n_taps
        self.margin_cycles = margin_cycles
        self.compiled = compiled

    def _validate_params(self) -> None:
        if self.algorithm not in ("rls", "nlms"):
            raise ValueError(f"algorithm must be 'rls' or 'nlms', got {self.algorithm!r}")
        if self.reference not in ("auto", "model", "monitor"):
            raise ValueError(f"reference must be 'auto', 'model' or 'monitor', got {self.reference!r}")
        if self.n_harmonics is not None and (int(self.n_harmonics) != self.n_harmonics or self.n_harmonics < 1):
            raise ValueError(f"n_harmonics must be a positive integer or None, got {self.n_harmonics!r}")
        if int(self.max_harmonics) != self.max_harmonics or self.max_harmonics < 1:
            raise ValueError(f"max_harmonics must be a positive integer, got {self.max_harmonics!r}")
        if not self.tracking_hz > 0:
            raise ValueError(f"tracking_hz must be positive, got {self.tracking_hz!r}")
        if not 0 < self.step < 2:
            raise ValueError(f"step must be in (0, 2), got {self.step!r}")
        if int(self.n_taps) != self.n_taps or self.n_taps < 1 or self.n_taps % 2 == 0:
            raise ValueError(f"n_taps must be a positive odd integer, got {self.n_taps!r}")
        if not self.margin_cycles >= 0:
            raise ValueError(f"margin_cycles must be >= 0, got {self.margin_cycles!r}")

    def context_seconds(self, freq_hz: float) -> float:
        """Context (s): ten time constants of the exponential window, plus the margin."""
        return 10.0 / (2 * np.pi * self.tracking_hz) + self.margin_cycles / freq_hz

    def _harmonics(self, x, w, u, fs, f) -> int:
        if self.n_harmonics is not None:
            return int(self.n_harmonics)
        # out of the noise, and not negligible against the fundamental: each modelled harmonic lets
        # the noise of a band about tracking_hz wide through, so weak ones cost more than they remove
        return int(min(self.max_harmonics, waveform_harmonics(x, u, fs, f, w=w, min_relative=_MIN_RELATIVE)))

    def _refs(self, u, monitor, h):
        if monitor is not None:
            half = int(self.n_taps) // 2
            m = np.pad(monitor, half, mode="edge")
            taps = np.stack([m[k:k + monitor.size] for k in range(int(self.n_taps))], axis=1)
            if self.reference == "monitor":
                return _independent(taps)
            # the harmonics the monitor's taps do not span (a pure sine spans its fundamental only); where they
            # do, the directions are dependent and dropped
            return _independent(np.hstack([taps, self._harmonic_refs(u, h)]))
        return self._harmonic_refs(u, h)

    @staticmethod
    def _harmonic_refs(u, h):
        k = np.arange(1, h + 1)
        ph = 2 * np.pi * np.outer(fractional_part(u), k)
        return np.hstack([np.cos(ph), np.sin(ph)])

    def _fit(self, refs, d, use, fs):
        if self.algorithm == "rls":
            lam = 1.0 - 2 * np.pi * self.tracking_hz / fs
            run = lambda r, x, s: rls_filter(r, x, forgetting=lam, use=s, compiled=self.compiled)[0]  # noqa: E731
        else:
            run = lambda r, x, s: nlms_filter(r, x, step=self.step, use=s, compiled=self.compiled)[0]  # noqa: E731
        fwd = run(refs, d, use)
        bwd = run(refs[::-1], d[::-1], use[::-1])[::-1]
        return 0.5 * (fwd + bwd)

    def _block(self, xb, wb, u, fs, blk, offset):
        f = blk.freq_hz
        monitor = None
        if self.reference in ("auto", "monitor") and getattr(self, "_monitor", None) is not None:
            monitor = self._monitor[offset:offset + xb.shape[1]]
        elif self.reference == "monitor":
            raise ValueError("reference='monitor' needs the monitor channel: pass stim_reference= to fit or clean")
        only_taps = monitor is not None and self.reference == "monitor"
        art = np.zeros_like(xb)
        hs = []
        for ch in range(xb.shape[0]):
            # the monitor's taps alone need no count of the waveform's harmonics
            h = None if only_taps else self._harmonics(xb[ch], wb[ch], u, fs, f)
            hs.append(h)
            refs = self._refs(u, monitor, h)
            # the references are zero outside the block's envelope only through the data: the filter
            # follows the ramps itself
            art[ch] = self._fit(refs, xb[ch], wb[ch], fs)
        info = dict(freq_hz=f, algorithm=self.algorithm,
                    reference="model" if monitor is None else ("monitor" if only_taps else "monitor+model"),
                    harmonics=None if only_taps else hs,
                    taps=int(self.n_taps) if monitor is not None else None)
        return art, info, None
