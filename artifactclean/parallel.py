"""Cleaning spread over workers: groups of channels, on threads or on a dask cluster.

Every estimator treats channels independently once the stimulation model and
the per-block plans (:meth:`prepare`) are fixed on the whole channel set, so a
recording can be cleaned as groups of channels with exactly the numbers of a
single run. Local workers are threads: numpy's array operations and the
compiled inner loops (numba, ``nogil``) release the interpreter lock, and
threads share the recording instead of copying it. A dask cluster
(:mod:`dask.distributed`) runs the same tasks in other processes or on other
machines; files are then opened inside each task by path (see
:class:`RecordingSpec`), because neo readers do not pickle after a read.
"""

from __future__ import annotations

import os
import threading
from collections import deque
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass
from typing import Callable, Iterable, Sequence

import numpy as np

from ._blas import one_blas_thread

__all__ = ["channel_groups", "check_workers", "clean_in_groups", "subset_clip", "RecordingSpec", "ordered_results",
           "open_client", "client_threads", "check_cluster", "piece_task", "edge_keys_task",
           "ClusterError"]


def check_workers(workers) -> int:
    """``workers`` as a positive int (``None`` or 0 means one per core)."""
    if workers is None or (isinstance(workers, (int, np.integer)) and not isinstance(workers, bool) and workers == 0):
        return max(1, os.cpu_count() or 1)
    if isinstance(workers, bool) or not isinstance(workers, (int, np.integer)) or workers < 0:
        raise ValueError(f"workers must be a positive integer (0 or None: one per core), got {workers!r}")
    return int(workers)


def channel_groups(n_channels: int, n_groups: int) -> list[list[int]]:
    """Split ``range(n_channels)`` into at most ``n_groups`` contiguous groups of near-equal size."""
    n_groups = max(1, min(int(n_groups), int(n_channels)))
    bounds = np.linspace(0, n_channels, n_groups + 1).round().astype(int)
    return [list(range(a, b)) for a, b in zip(bounds[:-1], bounds[1:]) if b > a]


def subset_clip(clip_level, fit: list[int]):
    """``clip_level`` for the channels ``fit``: per-channel rails are indexed, the rest pass through."""
    if clip_level is None or np.ndim(clip_level) == 0:
        return clip_level
    hi, lo = (np.asarray(v, dtype=float).reshape(-1) for v in clip_level)
    return hi[fit], lo[fit]


def _clean_group(est, x, n_keep: int, fit_kwargs: dict, out: np.ndarray):
    """Clean rows ``x`` with ``est`` in place (the caller hands them over) and leave the first ``n_keep``
    in ``out`` (rows of the cleaned array; ``x`` may be those rows already); return their lost mask and
    the report."""
    est._adopt_input = True
    y = est.fit_transform(x, **fit_kwargs)[:n_keep]
    if not np.shares_memory(y, out):
        out[...] = y
    return est.lost_[:n_keep], est.report_


@one_blas_thread
def clean_in_groups(est, data, fs: float, *, workers: int, stim_freq=None, stim_reference=None,
                    clip_level=None, nan_policy: str = "raise") -> tuple[np.ndarray, np.ndarray, list[dict]]:
    """Clean an array as groups of channels on ``workers`` threads.

    The stimulation model is fitted once on all channels and, for estimators
    that plan per block, :meth:`prepare` runs on all channels, exactly as a
    single :meth:`fit` would; each group is then fitted by a clone from
    :meth:`~artifactclean.estimators.ArtifactEstimator.for_channels`.

    Parameters
    ----------
    est : ArtifactEstimator
    data : array_like, shape (n_channels, n_samples) or (n_samples,)
    fs : float
    workers : int
    stim_freq, stim_reference, clip_level, nan_policy
        As for :meth:`ArtifactEstimator.fit`.

    Returns
    -------
    cleaned : ndarray, same shape as ``data``
    lost : ndarray of bool, shape (n_channels, n_samples)
    reports : list of dict
        One per group, with the group's channel indices.
    """
    import warnings

    from .estimators.base import _check_reference, _fit_model, validate_recording
    from .estimators.cycles import array_reader

    est._validate_params()
    x, fs, squeeze = validate_recording(data, fs, nan_policy=nan_policy)
    finite = np.isfinite(x)
    x_model = np.where(finite, x, 0.0) if not finite.all() else x
    monitor = _check_reference(stim_reference, x.shape[1])
    model = _fit_model(x_model, fs, stim_freq, monitor)
    if not model.blocks:
        hint = f" near {stim_freq} Hz" if stim_freq else ""
        warnings.warn(f"no stimulation found{hint}: the data are returned unchanged. If the "
                      "frequency hint may be wrong, run `artifactclean survey` without it", stacklevel=3)
    groups = channel_groups(x.shape[0], workers)
    with ThreadPoolExecutor(max_workers=len(groups)) as pool:
        if hasattr(est, "prepare"):
            est.prepare(array_reader(x_model), model, fs, mapper=pool.map)  # each block's work on the workers
        tasks = []
        for g in groups:
            sub, fit = est.for_channels(g)
            kwargs = dict(fs=fs, stim_model=model, clip_level=subset_clip(clip_level, fit),
                          stim_reference=monitor, nan_policy=nan_policy)
            rows = x[g[0]:g[-1] + 1]  # groups are contiguous: their rows of x, cleaned in place
            # a group that also fits another group's channel (a DAC grid's reference) works in a copy, taken
            # before any group starts cleaning its rows
            tasks.append((sub, rows if fit == list(g) else x[fit], len(g), kwargs, rows))
        jobs = [pool.submit(_clean_group, *task) for task in tasks]
        del tasks
        parts = [j.result() for j in jobs]
    lost = np.concatenate([p[0] for p in parts], axis=0)
    reports = [dict(channels=g, **p[1]) for g, p in zip(groups, parts)]
    return (x[0] if squeeze else x), lost, reports


# ---------------------------------------------------------------- files
@dataclass(frozen=True)
class RecordingSpec:
    """What reopens a file recording inside a task: path, rawio format, stream, block, segment."""

    path: str
    format: str | None
    stream: int
    block: int
    segment: int

    @classmethod
    def of(cls, rec) -> "RecordingSpec":
        return cls(str(rec.path), rec.format, int(rec.stream_index), int(rec.block), int(rec.segment))

    def open(self):
        """The recording, opened once per process (headers are parsed once, reads are lazy)."""
        key = self
        with _OPEN_LOCK:
            rec = _OPEN.get(key)
            if rec is None:
                from .io.reader import NeoRecording

                rec = NeoRecording(self.path, format=self.format, stream=self.stream, block=self.block,
                                   segment=self.segment)
                _OPEN[key] = rec
        return rec


_OPEN: dict = {}
_OPEN_LOCK = threading.Lock()


class LockedReader:
    """Reads of one open recording shared by threads, one at a time."""

    def __init__(self, rec):
        self.rec = rec
        self.lock = threading.Lock()

    def open(self):
        return self

    def read(self, a, b, channels):
        with self.lock:
            return self.rec.read(a, b, channels)


def piece_task(source, channels: Sequence[int], n_keep: int, lo: int, hi: int, a: int, b: int, est, model,
               clip_level, fs: float, edge_keys=None):
    """Read samples ``lo..hi`` of ``channels`` from ``source``, clean them, return the core ``a..b``.

    Runs in a worker: ``source`` is a :class:`LockedReader` (threads) or a
    :class:`RecordingSpec` (processes, a cluster), opened here. ``edge_keys``
    (for a clone made with ``shared_edges=True``) is what
    :func:`edge_keys_task` returned for the same piece, or a future of it on
    this process (a dask cluster hands over the value itself).
    """
    if edge_keys is not None:
        # a thread waits for the piece's judges, submitted before it (the pool takes tasks in order)
        est._edge_keys = edge_keys.result() if hasattr(edge_keys, "result") else edge_keys
    x = source.open().read(lo, hi, list(channels))
    # the piece was read for this task alone: the estimator cleans it in place, without a copy
    est._adopt_input = True
    y = est.fit_transform(x, fs=fs, stim_model=model, clip_level=clip_level)
    del x
    y = y[:n_keep, a - lo: b - lo].copy()
    lost = est.lost_[:n_keep, a - lo: b - lo].copy()
    return y, lost, est.report_


def edge_keys_task(source, channels: Sequence[int], lo: int, hi: int, est, model, clip_level, fs: float) -> dict:
    """The tick keys a piece's judges settle beside a DAC's edges, for the piece's channel tasks.

    ``est`` and ``channels`` come from ``for_channels(edge_judges(blk))``
    (:meth:`~artifactclean.estimators.cycles.CycleEstimator.edge_judges`);
    the judges are fitted as far as their last settling. Every channel task
    of the piece then cleans its channels alone with these keys, as it would
    have with the judges' data beside them, to the bit; without them each
    task read and cleaned the judges again (with one output channel a task,
    half its time).
    """
    x = source.open().read(lo, hi, list(channels))
    est._adopt_input = True
    est._record_edges = True
    est.fit(x, fs=fs, stim_model=model, clip_level=clip_level)
    return dict(getattr(est, "edge_keys_", {}))


def ordered_results(items: Iterable, submit: Callable, ahead: int):
    """Yield items in order with their task's result, keeping up to ``ahead`` tasks submitted in advance.

    ``items`` yields ``(kind, payload)``; for kind ``"task"``, ``submit(payload)``
    returns a future (other kinds pass through with ``None``). Memory stays
    bounded by ``ahead`` results, whatever the number of items.
    """
    queue: deque = deque()
    it = iter(items)
    done = False
    while True:
        while not done and sum(k == "task" for k, _, _ in queue) < ahead:
            try:
                kind, payload = next(it)
            except StopIteration:
                done = True
                break
            queue.append((kind, payload, submit(payload) if kind == "task" else None))
        if not queue:
            return
        kind, payload, future = queue.popleft()
        result = None if future is None else future.result()
        del future
        yield kind, payload, result
        del result


def open_client(cluster):
    """A ``dask.distributed.Client`` from a client, a scheduler address, or None; and whether we own it."""
    if cluster is None:
        return None, False
    try:
        from dask.distributed import Client
    except ImportError as exc:  # pragma: no cover - depends on the installation
        raise ImportError("a dask cluster needs dask.distributed: pip install 'artifactclean[cluster]'") from exc
    if isinstance(cluster, Client):
        return cluster, False
    if isinstance(cluster, str):
        return Client(cluster), True
    raise TypeError(f"cluster must be a dask.distributed.Client or a scheduler address, got {type(cluster).__name__}")


class ClusterError(RuntimeError):
    """A dask cluster that cannot clean this recording as a local run would."""


def _installed_version() -> str:
    from . import __version__

    return __version__


def check_cluster(client) -> None:
    """Refuse a cluster whose workers run another artifactclean (or none): results would differ."""
    from . import __version__

    try:
        found = client.run(_installed_version)
    except Exception as exc:  # a worker that cannot import the package raises here
        raise ClusterError(f"the dask workers cannot run artifactclean ({exc}); install artifactclean "
                           f"{__version__} where they run") from None
    other = sorted({v for v in found.values() if v != __version__})
    if not found:
        raise ClusterError("the dask cluster has no workers; start some (`dask worker ADDRESS`)")
    if other:
        raise ClusterError(f"dask workers run artifactclean {', '.join(other)}; this is {__version__}. "
                           "Install the same version on the workers (and restart them after an upgrade)")


def client_threads(client) -> int:
    """Worker threads a dask client's cluster offers."""
    return max(1, int(sum(client.nthreads().values())))
