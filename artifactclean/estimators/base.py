"""Common machinery of the artifact estimators.

Every estimator follows scikit-learn conventions: ``__init__`` stores
parameters untouched, ``fit`` validates them and learns attributes ending in
``_``, and :func:`sklearn.base.clone` works. Data are arrays of shape
``(n_channels, n_samples)`` (the layout of a recording; note that this is
the transpose of scikit-learn's ``(n_samples, n_features)``).

Because a stimulation artifact is not stationary, ``fit`` learns the
artifact *of the data it is given*; ``transform`` subtracts it and accepts
only that same recording.
"""

from __future__ import annotations

import warnings

import numpy as np
from sklearn.base import BaseEstimator

from .._blas import one_blas_thread
from ..clipping import find_clipped
from ..stimulation import StimulationModel, fit_stimulation

__all__ = ["ArtifactEstimator", "validate_recording"]


def validate_recording(data, fs, *, nan_policy: str = "raise", copy: bool = True) -> tuple[np.ndarray, float, bool]:
    """Check a recording array and sampling rate; return a 2-D float64 copy.

    Parameters
    ----------
    data : array_like, shape (n_channels, n_samples) or (n_samples,)
    fs : float
    nan_policy : {"raise", "blank"}
        ``"blank"`` treats non-finite samples as lost (like clipped ones).
    copy : bool
        False returns ``data`` itself when it already is a 2-D float64 array,
        for callers that own it and let it be changed.

    Returns
    -------
    x : ndarray, shape (n_channels, n_samples), float64
    fs : float
    squeeze : bool
        Whether the input was 1-D.
    """
    if isinstance(data, (str, bytes)) or data is None:
        raise TypeError(f"data must be a numeric array of shape (n_channels, n_samples), got {type(data).__name__}")
    arr = np.asarray(data)
    if arr.dtype == object or not (np.issubdtype(arr.dtype, np.number) or arr.dtype == bool):
        raise TypeError(f"data must be numeric, got dtype {arr.dtype}")
    if np.iscomplexobj(arr):
        raise TypeError("data must be real-valued, got a complex array")
    if arr.ndim not in (1, 2):
        raise ValueError(f"data must be 1-D (one channel) or 2-D (n_channels, n_samples), got {arr.ndim}-D shape {arr.shape}")
    squeeze = arr.ndim == 1
    x = np.array(arr, dtype=np.float64, ndmin=2, copy=True if copy else None)
    if x.shape[1] < x.shape[0]:
        raise ValueError(
            f"data has shape {x.shape}: more channels than samples. Pass (n_channels, n_samples); "
            "transpose a (n_samples, n_channels) array with data.T"
        )
    if x.shape[1] == 0:
        raise ValueError("data holds no samples")
    try:
        fs = float(fs)
    except (TypeError, ValueError):
        raise TypeError(f"fs must be a number (Hz), got {fs!r}") from None
    if not np.isfinite(fs) or fs <= 0:
        raise ValueError(f"fs must be a positive sampling rate in Hz, got {fs}")
    if nan_policy not in ("raise", "blank"):
        raise ValueError(f"nan_policy must be 'raise' or 'blank', got {nan_policy!r}")
    bad = ~np.isfinite(x)
    if bad.any() and nan_policy == "raise":
        ch, i = np.argwhere(bad)[0]
        raise ValueError(
            f"data holds {int(bad.sum())} NaN or inf samples (first: channel {ch}, sample {i}); "
            "pass nan_policy='blank' to treat them as lost samples"
        )
    return x, fs, squeeze


class ArtifactEstimator(BaseEstimator):
    """Base class: learn the stimulation artifact of a recording and subtract it.

    Subclasses implement ``_estimate(x, fs, model, lost)`` returning the
    artifact array, a dict describing what they chose and, optionally, a
    mask of further samples they cannot clean (reported as lost), and
    ``context_cycles`` (how many stimulation cycles of context an output
    sample needs on each side, for chunked processing).

    Fitted attributes
    -----------------
    stim_model_ : StimulationModel
    artifact_ : ndarray, shape (n_channels, n_samples)
    lost_ : ndarray of bool
        Samples that cannot be recovered (clipped, or non-finite input).
    report_ : dict
        What the estimator chose (parameters resolved from the data).
    fs_ : float
    """

    #: stimulation cycles of context needed on each side of an output sample
    context_cycles: float = 0.0
    #: peak working memory of a fit, in float64 values per sample: ``(per channel, per sample of time)``
    #: (arrays of the piece's length that all channels share: phases, interpolation indices, the ramp);
    #: file pieces are sized from it (:func:`artifactclean.io.pipeline.clean_recording`)
    memory_per_sample: tuple[float, float] = (5.0, 20.0)

    @one_blas_thread
    def fit(
        self,
        X,
        y=None,
        *,
        fs: float,
        stim_model: StimulationModel | None = None,
        stim_freq: float | None = None,
        stim_reference=None,
        clip_level=None,
        nan_policy: str = "raise",
    ):
        """Learn the artifact of recording ``X``.

        Parameters
        ----------
        X : array_like, shape (n_channels, n_samples)
        y : ignored
        fs : float
            Sampling rate (Hz).
        stim_model : StimulationModel, optional
            A model fitted before; otherwise one is fitted from ``X``,
            ``stim_freq`` and ``stim_reference``.
        stim_freq : float, optional
            Nominal stimulation frequency (Hz).
        stim_reference : array_like, optional
            Recorded stimulator monitor signal, shape (n_samples,).
        clip_level : float or (ndarray, ndarray), optional
            Amplifier rail in the unit of ``X`` (symmetric), or per-channel
            ``(upper, lower)`` rails; found from the data if None.
        nan_policy : {"raise", "blank"}

        Returns
        -------
        self
        """
        self._validate_params()
        x, fs, _ = validate_recording(X, fs, nan_policy=nan_policy, copy=not self._adopt_input)
        lost = ~np.isfinite(x)
        if lost.any():
            x[lost] = 0.0
        lost |= find_clipped(x, clip_level=clip_level)
        flat = np.flatnonzero(np.ptp(x, axis=1) == 0)
        if flat.size:
            warnings.warn(f"channel(s) {flat.tolist()} are flat (constant): left as they are; "
                          "check the electrode or the channel list", stacklevel=2)
        # a monitor channel serves the stimulation model and estimators that use it as a reference
        self._monitor = _check_reference(stim_reference, x.shape[1])
        if stim_model is None:
            stim_model = _fit_model(x, fs, stim_freq, self._monitor)
            if not stim_model.blocks:
                hint = f" near {stim_freq} Hz" if stim_freq else ""
                warnings.warn(f"no stimulation found{hint}: the data are returned unchanged. If the "
                              "frequency hint may be wrong, run `artifactclean survey` without it", stacklevel=2)
        elif stim_model.n_samples != x.shape[1]:
            raise ValueError(f"stim_model covers {stim_model.n_samples} samples, data has {x.shape[1]}")
        result = self._estimate(x, fs, stim_model, lost)
        artifact, report = result[:2]
        artifact[flat] = 0.0  # nothing to subtract from a constant
        if len(result) > 2 and result[2] is not None:
            # samples the estimator found it cannot clean (e.g. phases clipped nearby)
            lost |= result[2]
        self.stim_model_ = stim_model
        self.artifact_ = artifact
        if self._keep_copy:
            # fit_transform subtracts in this validated copy instead of copying X again
            self._validated = x
        self.lost_ = lost
        self.report_ = dict(method=self._method_name, **report)
        self.fs_ = fs
        self.n_samples_ = x.shape[1]
        return self

    def transform(self, X) -> np.ndarray:
        """Subtract the fitted artifact from the recording it was fitted on.

        Lost samples (clipped or non-finite) are set to 0.
        """
        if not hasattr(self, "artifact_"):
            raise RuntimeError(f"{type(self).__name__} is not fitted: call fit(X, fs=...) first")
        arr = np.asarray(X)
        x = np.array(arr, dtype=np.float64, ndmin=2, copy=True)
        if x.shape != self.artifact_.shape:
            raise ValueError(
                f"transform takes the recording fit saw, shape {self.artifact_.shape}; got {x.shape}. "
                "The artifact is not stationary: fit each recording"
            )
        x -= self.artifact_
        x[self.lost_] = 0.0
        return x.reshape(arr.shape) if arr.ndim == 1 else x

    _keep_copy = False
    #: set by a caller that owns ``X`` (a file piece read for one task): fit works in it, without a copy
    _adopt_input = False

    def fit_transform(self, X, y=None, **fit_params) -> np.ndarray:
        """``fit(X, **fit_params)`` then ``transform(X)`` (without a second copy of ``X``)."""
        self._keep_copy = True
        try:
            self.fit(X, y, **fit_params)
        finally:
            self._keep_copy = False
        arr = np.asarray(X)
        out = self._validated
        del self._validated
        out -= self.artifact_
        out[self.lost_] = 0.0
        return out.reshape(arr.shape) if arr.ndim == 1 else out

    def context_seconds(self, freq_hz: float) -> float:
        """Context (s) an output sample needs on each side at ``freq_hz`` stimulation."""
        return self.context_cycles / freq_hz

    def block_memory_per_sample(self, blk) -> tuple[float, float]:
        """:attr:`memory_per_sample` for the work range of ``blk`` (None: outside blocks)."""
        return self.memory_per_sample

    def work_ranges(self, model: StimulationModel, fs: float) -> list:
        """Sample ranges ``(start, stop, block)`` the estimator cleans independently.

        The default is the whole recording as one range (block None); an
        estimator that touches only stimulation blocks returns one range
        per block, which lets files be cleaned block by block.
        """
        return [(0, model.n_samples, None)]

    #: attributes :meth:`prepare` sets that a copy for other channels carries along
    _prepared_attrs: tuple = ()

    def for_channels(self, channels, *, shared_edges: bool = False) -> tuple["ArtifactEstimator", list[int]]:
        """A clone for a subset of the channels, carrying what ``prepare`` decided.

        Workers clean groups of channels with such clones. Every estimator
        here treats channels independently except for the reference channel
        a block plan reads (the DAC tick edges of the template), which the
        clone's channel list then includes.

        Parameters
        ----------
        channels : sequence of int
            Channel indices (into the array ``prepare`` saw) the clone cleans.
        shared_edges : bool
            Leave the channels that judge a DAC's tick edges out of
            ``fit_channels``: the clone is given their choices instead
            (:meth:`~artifactclean.estimators.cycles.CycleEstimator.edge_judges`).
            Estimators that read no other channel ignore it.

        Returns
        -------
        estimator : ArtifactEstimator
            Unfitted clone, prepared for ``fit_channels``.
        fit_channels : list of int
            ``channels`` in order, then any channel the clone must see besides;
            fit the clone on these and keep the first ``len(channels)`` rows.
        """
        from sklearn.base import clone

        est = clone(self)
        for name in self._prepared_attrs:
            if hasattr(self, name):
                setattr(est, name, getattr(self, name))
        return est, [int(c) for c in channels]

    # subclasses ----------------------------------------------------------
    _method_name = "base"

    def _validate_params(self) -> None:
        """Raise ValueError naming any bad parameter."""

    def _estimate(self, x, fs, model, lost):  # pragma: no cover - abstract
        raise NotImplementedError


def check_stim_freq(stim_freq, fs: float, n_samples: int | None = None):
    """``stim_freq`` (a number or a sequence of numbers) validated: a float, a list of floats, or None.

    Raises
    ------
    TypeError
        For something that is not a number or a sequence of numbers.
    ValueError
        For a frequency that is not positive, at or above Nyquist, or that the
        recording holds fewer than 8 cycles of (when ``n_samples`` is given).
    """
    if stim_freq is None:
        return None
    try:
        values = np.atleast_1d(np.asarray(stim_freq, dtype=np.float64))
    except (TypeError, ValueError):
        raise TypeError(f"stim_freq must be a number (Hz) or a list of numbers, got {stim_freq!r}") from None
    if values.ndim != 1 or values.size == 0:
        raise TypeError(f"stim_freq must be a number (Hz) or a list of numbers, got {stim_freq!r}")
    for f in values:
        if not np.isfinite(f) or f <= 0:
            raise ValueError(f"stim_freq must be positive, got {f:g}")
        if f >= fs / 2:
            raise ValueError(
                f"stim_freq {f:g} Hz is at or above the Nyquist frequency {fs / 2:g} Hz of fs={fs:g}; "
                "check the sampling rate and the stimulation frequency"
            )
        if n_samples is not None and n_samples / fs * f < 8:
            raise ValueError(
                f"recording holds {n_samples / fs * f:.1f} stimulation cycles at {f:g} Hz; at least 8 are needed"
            )
    return float(values[0]) if np.ndim(stim_freq) == 0 else [float(f) for f in values]


def _fit_model(x, fs, stim_freq, stim_reference) -> StimulationModel:
    stim_freq = check_stim_freq(stim_freq, fs, x.shape[1])
    return fit_stimulation(x, fs, stim_freq=stim_freq, reference=_check_reference(stim_reference, x.shape[1]))


def _check_reference(stim_reference, n: int) -> np.ndarray | None:
    """The monitor channel as a float64 vector of ``n`` finite samples (or None)."""
    if stim_reference is None:
        return None
    ref = np.asarray(stim_reference, dtype=np.float64).ravel()
    if ref.size != n:
        raise ValueError(f"stim_reference has {ref.size} samples, data has {n}")
    if not np.all(np.isfinite(ref)):
        raise ValueError("stim_reference holds NaN or inf samples")
    return ref
