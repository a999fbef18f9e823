"""The convenience door: :func:`clean`."""

from __future__ import annotations

import numpy as np

from .estimators import DEFAULT_METHOD, make_estimator
from .parallel import check_workers, clean_in_groups

__all__ = ["clean"]


def clean(
    data,
    fs: float,
    *,
    stim_freq: float | None = None,
    stim_reference=None,
    method: str = DEFAULT_METHOD,
    nan_policy: str = "raise",
    clip_level: float | None = None,
    workers: int = 1,
    **params,
) -> np.ndarray:
    """Remove the stimulation artifact from a recording.

    Parameters
    ----------
    data : array_like, shape (n_channels, n_samples) or (n_samples,)
        The recording, in any unit. Never modified.
    fs : float
        Sampling rate (Hz).
    stim_freq : float, optional
        Nominal stimulation frequency (Hz); refined from the data. Without it
        the strongest spectral peak up to 200 Hz is taken.
    stim_reference : array_like, shape (n_samples,), optional
        A recorded stimulator monitor signal; the stimulation phase comes
        from it instead of the data.
    method : str
        ``"template"`` (default), ``"regression"``, ``"pca"``, ``"adaptive"`` or ``"comb"``.
    nan_policy : {"raise", "blank"}
        What to do with NaN or inf samples: raise, or treat them as lost.
    clip_level : float, optional
        Amplifier rail in the unit of ``data``; found from the data if None.
    workers : int
        Threads cleaning groups of channels at once (0: one per core). The
        result equals that of one worker (channels are cleaned independently
        once the stimulation model and the block plans are fixed on all of
        them); see :mod:`artifactclean.parallel`.
    **params
        Parameters of the chosen estimator (see its class).

    Returns
    -------
    ndarray
        Float array of the same shape as ``data``. Samples that cannot be
        recovered (clipped, non-finite) are 0; the estimator's ``lost_``
        attribute says where (use the estimator classes for that).

    Raises
    ------
    ValueError, TypeError
        With a message naming the problem: unknown method, ``fs <= 0``,
        ``stim_freq`` at or above Nyquist, too few cycles, NaN or inf
        samples, wrong dimensions.
    """
    est = make_estimator(method, **params)
    workers = check_workers(workers)
    if workers > 1 and np.ndim(data) == 2 and np.shape(data)[0] > 1:
        return clean_in_groups(est, data, fs, workers=workers, stim_freq=stim_freq, stim_reference=stim_reference,
                               clip_level=clip_level, nan_policy=nan_policy)[0]
    return est.fit_transform(
        data, fs=fs, stim_freq=stim_freq, stim_reference=stim_reference,
        nan_policy=nan_policy, clip_level=clip_level,
    )
