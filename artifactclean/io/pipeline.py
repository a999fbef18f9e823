"""Files in, files out: survey a recording, clean it chunk by chunk, write it with provenance.

The recording is read three times, never whole:

1. a scan (all channels, in chunks): per-channel mean and spread, and the
   amplifier rails (the extreme value when it recurs on consecutive samples);
2. the reference (the monitor channel, or the channel with the largest
   spread) streamed through the same decimation as
   :func:`artifactclean.fit_stimulation`, which gives the stimulation model;
3. the cleaning pass: each range an estimator cleans independently (a block
   and its margins for the template) is cleaned as tasks of one channel
   group over one piece of time (with the estimator's declared context on
   each side), on this thread, worker threads or a dask cluster, and written
   group by group; the stretches between ranges are copied.

For recordings whose blocks fit in one range the output equals
``artifactclean.clean`` on the same samples.
"""

from __future__ import annotations

import datetime as _dt
import hashlib
import warnings
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass
from pathlib import Path
from typing import Callable, Sequence

import numpy as np

from .._blas import one_blas_thread
from .._version import __version__
from ..clipping import find_clipped, mask_runs, rail_rule
from ..estimators import DEFAULT_METHOD, make_estimator
from ..estimators.base import check_stim_freq
from ..staircase import find_dac_clock, find_dac_grid, find_dac_period, step_rate
from ..stimulation import StimulationModel, decimate_reader, decimated_rate, fit_decimated
from ..parallel import (LockedReader, RecordingSpec, subset_clip, channel_groups, check_cluster, check_workers,
                        client_threads, edge_keys_task, open_client, ordered_results, piece_task)
from .reader import NeoRecording, Recording
from .writers import open_writer, output_paths

__all__ = ["Scan", "scan_recording", "fit_recording_stimulation", "clean_recording", "survey_recording",
           "input_files", "check_output"]

Progress = Callable[[int, int, str], None]


@dataclass
class Scan:
    """What one pass over all channels tells: level, spread and rails per channel."""

    mean: np.ndarray
    std: np.ndarray
    rail_hi: np.ndarray
    rail_lo: np.ndarray
    n_at_rails: np.ndarray
    n_samples: int

    @property
    def rails(self) -> tuple[np.ndarray, np.ndarray]:
        return self.rail_hi, self.rail_lo


def _chunks(start: int, stop: int, size: int):
    for a in range(start, stop, size):
        yield a, min(stop, a + size)


class _ExtremeRuns:
    """A channel's running maximum (``sign`` 1) or minimum (-1) over chunks read in order, with the runs of
    samples at it (:func:`artifactclean.clipping.rail_rule`): a run that spans two chunks is one run."""

    __slots__ = ("sign", "value", "count", "n_runs", "longest", "tail")

    def __init__(self, sign: int):
        self.sign = sign
        self.value = -sign * np.inf
        self.count = self.n_runs = self.longest = self.tail = 0

    def _close(self) -> None:
        # the run that reached the end of the chunk before has ended
        if self.tail >= 2:
            self.n_runs += 1
            self.longest = max(self.longest, self.tail)
        self.tail = 0

    def add(self, row: np.ndarray, extreme: float) -> None:
        if self.sign * (extreme - self.value) > 0:
            self.value, self.count, self.n_runs, self.longest, self.tail = extreme, 0, 0, 0, 0
        if extreme != self.value:
            self._close()
            return
        at = row == extreme
        self.count += int(at.sum())
        runs = [[p, q] for p, q in mask_runs(at)]
        if self.tail and runs[0][0] == 0:
            runs[0][0] -= self.tail  # the run goes on from the chunk before
            self.tail = 0
        else:
            self._close()
        if runs[-1][1] == row.size:
            self.tail = runs[-1][1] - runs[-1][0]
            runs.pop()
        for p, q in runs:
            if q - p >= 2:
                self.n_runs += 1
                self.longest = max(self.longest, q - p)

    def rail(self) -> bool:
        """Whether the extreme is a rail, the run still open at the last read included."""
        open_run = self.tail >= 2
        return rail_rule(self.n_runs + open_run, max(self.longest, self.tail) if open_run else self.longest)


def scan_recording(rec: Recording, channels: Sequence[int], *, chunk: int | None = None,
                   progress: Progress | None = None) -> Scan:
    """One pass over ``channels`` of ``rec``: mean, SD and amplifier rails per channel.

    A rail is the channel's maximum (minimum) over the whole recording when
    that exact value recurs in runs, the rule of
    :func:`artifactclean.clipping.find_rails` (runs that span two reads
    are one).
    """
    k = len(channels)
    if chunk is None:
        # 4 Mi samples a read (32 MiB as float64), whatever the channel count
        chunk = max(1, 2**22 // max(k, 1))
    s1, s2 = np.zeros(k), np.zeros(k)
    ends = [(_ExtremeRuns(1), _ExtremeRuns(-1)) for _ in range(k)]
    n = rec.n_samples
    for a, b in _chunks(0, n, chunk):
        x = rec.read(a, b, channels)
        s1 += x.sum(axis=1)
        s2 += np.einsum("ij,ij->i", x, x)
        for vals, side in ((x.max(axis=1), 0), (x.min(axis=1), 1)):
            for ch in range(k):
                ends[ch][side].add(x[ch], vals[ch])
        if progress:
            progress(b, n, "scanning")
    mean = s1 / n
    std = np.sqrt(np.maximum(s2 / n - mean**2, 0.0))
    hi, lo = (np.array([e[side].value for e in ends]) for side in (0, 1))
    hi_run, lo_run = (np.array([e[side].rail() for e in ends], dtype=bool) for side in (0, 1))
    n_hi, n_lo = (np.array([e[side].count for e in ends], dtype=np.int64) for side in (0, 1))
    # a flat (dead) channel has no rail: it is constant, not clipped
    flat = hi == lo
    rail_hi = np.where(hi_run & ~flat, hi, np.inf)
    rail_lo = np.where(lo_run & ~flat, lo, -np.inf)
    n_at = np.where(hi_run, n_hi, 0) + np.where(lo_run, n_lo, 0)
    return Scan(mean, std, rail_hi, rail_lo, n_at, n)


def fit_recording_stimulation(rec: Recording, channels: Sequence[int], scan: Scan, *,
                              stim_freq: float | None = None, monitor: tuple[Recording, int] | None = None,
                              fmax: float = 200.0) -> StimulationModel:
    """Stimulation model of a recording, streamed through the same decimation as arrays."""
    stim_freq = check_stim_freq(stim_freq, rec.fs)
    if monitor is not None:
        mrec, mch = monitor
        if mrec.n_samples != rec.n_samples or mrec.fs != rec.fs:
            raise ValueError(f"monitor channel has {mrec.n_samples} samples at {mrec.fs} Hz; "
                             f"the data have {rec.n_samples} at {rec.fs} Hz")
        # the monitor's mean from one extra pass keeps the decimation identical to the array path
        tot = 0.0
        for a, b in _chunks(0, mrec.n_samples, 2**20):
            tot += float(mrec.read(a, b, [mch])[0].sum())
        mean = tot / mrec.n_samples
        read = lambda a, b: mrec.read(a, b, [mch])[0] - mean  # noqa: E731
        source = "monitor"
    else:
        ref = int(np.argmax(scan.std))
        mean = scan.mean[ref]
        read = lambda a, b: rec.read(a, b, [channels[ref]])[0] - mean  # noqa: E731
        source = f"data channel {ref}"
    x_ds, fs_ds = decimate_reader(read, rec.n_samples, rec.fs, decimated_rate(stim_freq, fmax))
    return fit_decimated(x_ds, fs_ds, rec.fs, rec.n_samples, stim_freq=stim_freq, source=source, fmax=fmax,
                         read=read)


def input_files(path: Path) -> list[Path]:
    """The files a recording at ``path`` consists of (a directory's files, or same-stem siblings)."""
    path = Path(path).resolve()
    if path.is_dir():
        return [p for p in path.rglob("*") if p.is_file()]
    return sorted(p for p in path.parent.glob(path.stem + ".*") if p.is_file()) or [path]


def check_output(output: Path, source: Path | None, force: bool) -> list[Path]:
    """Refuse outputs that would overwrite without ``force``, land in a missing folder or in the input."""
    output = Path(output)
    paths = output_paths(output)
    parent = output.resolve().parent
    if not parent.is_dir():
        raise ValueError(f"output folder {parent} does not exist; create it first")
    if source is not None:
        src = Path(source).resolve()
        inside = src.is_dir() and (parent == src or src in parent.parents)
        if inside or any(p.resolve() in set(input_files(src)) for p in paths):
            raise ValueError(f"{output} would write into the input {source}; choose another place")
    existing = [p for p in paths if p.exists()]
    if existing and not force:
        raise ValueError(f"{', '.join(map(str, existing))} already exist{'s' if len(existing) == 1 else ''}; "
                         "pass --force to overwrite")
    return paths


def _checksum(path: Path) -> dict:
    files = input_files(path)
    root = Path(path).resolve()
    root = root if root.is_dir() else root.parent
    h = hashlib.sha256()
    size = 0
    for f in sorted(files):
        h.update(str(f.relative_to(root)).encode())
        with open(f, "rb") as fh:
            for block in iter(lambda: fh.read(1 << 22), b""):
                h.update(block)
                size += len(block)
    return dict(path=str(Path(path).resolve()), size_bytes=size, sha256=h.hexdigest(), files=len(files))


@one_blas_thread
def clean_recording(
    rec: Recording,
    output,
    *,
    channels: Sequence[int] | None = None,
    method: str = DEFAULT_METHOD,
    params: dict | None = None,
    stim_freq: float | None = None,
    monitor: tuple[Recording, int] | None = None,
    force: bool = False,
    gain_uv: float | None = None,
    chunk_s: float = 10.0,
    max_range_s: float = 30.0,
    progress: Progress | None = None,
    command: str | None = None,
    workers: int = 1,
    cluster=None,
) -> dict:
    """Clean a recording into ``output`` (``.dat``/``.bin`` or ``.nix``).

    Parameters
    ----------
    rec : Recording
    output : path
    channels : sequence of int, optional
        Channel indices to clean and write (default: all but the monitor).
    method, params
        Estimator name and parameters.
    stim_freq : float, optional
    monitor : (Recording, int), optional
        Recording and index of the stimulator monitor channel.
    force : bool
        Overwrite an existing output.
    gain_uv : float, optional
        int16 step for ``.dat`` (default: the file's own gain when it is
        stored as integers, else 0.195 uV).
    chunk_s, max_range_s : float
        Seconds read at a time for copying, and the memory budget of one
        cleaning task, both in seconds of 4 channels (more channels read
        shorter chunks; a task's memory counts the estimator's arrays
        shared by all channels too, see ``_task_shape``). A task cleans a
        group of channels over a piece of time with the estimator's full
        context on each side; channels are grouped so that a piece holds
        at least four contexts, so the output equals cleaning the whole
        array at once (to float32 for the template, adaptive and comb).
        Where even one channel's piece is shorter than that (the template
        at 4 Hz and below at the default 30 s) a piece may grow to twice the
        budget and its context is cut to a quarter of it; the summary and
        the provenance list every cut (``context_cut``), and below two
        thirds of the declared context (the template below about 2.7 Hz)
        the run warns and names the ``max_range_s`` that keeps it whole:
        near the piece edges the output then differs from the whole array
        (2 Hz, half the context: 0.45 uV, 5e-5 of the range).
    progress : callable(done, total, stage), optional
    workers : int
        Threads cleaning groups of channels at once (0: one per core); with
        ``cluster``, the number of channel groups (default: the cluster's
        threads). The output is the same whatever the count.
    cluster : dask.distributed.Client or str, optional
        A dask client, or a scheduler address such as ``"tcp://host:8786"``:
        pieces are cleaned there, each task opening the file by path, and
        written here in order.

    Returns
    -------
    dict
        Summary: written paths, stimulation model, clipped stretches,
        saturated samples.
    """
    source = Path(rec.path) if isinstance(rec, NeoRecording) else None
    check_output(Path(output), source, force)
    _warn_other_segments(rec)
    n_workers = check_workers(workers)
    for name, v in (("chunk_s", chunk_s), ("max_range_s", max_range_s)):
        if isinstance(v, bool) or not isinstance(v, (int, float, np.integer, np.floating)) or not np.isfinite(v) \
                or v <= 0:
            raise ValueError(f"{name} must be a positive number of seconds, got {v!r}")
    if cluster is not None:
        if not isinstance(cluster, str) and not hasattr(cluster, "submit"):
            raise TypeError(f"cluster must be a dask.distributed.Client or a scheduler address, "
                            f"got {type(cluster).__name__}")
        if source is None:
            raise TypeError("a dask cluster opens the recording by path in each task: pass a file, not an array")
    if channels is None:
        channels = [i for i in range(rec.n_channels) if monitor is None or monitor[0] is not rec or i != monitor[1]]
    channels = list(channels)
    if not channels:
        raise ValueError("no channels to clean")
    est = make_estimator(method, **(params or {}))
    est._validate_params()
    # chunk_s is for 4 channels: more channels read shorter chunks, so memory follows the budget
    chunk = max(1, int(chunk_s * rec.fs * min(1.0, 4 / len(channels))))
    fs = rec.fs
    # a task holds the memory of `budget` samples (4 channels x time): groups of channels, each cleaned
    # over pieces long enough for the estimator's full context; whatever the channel count
    budget = max(int(max_range_s * fs * 4), 4 * chunk)
    # freed heap memory the cleaning reuses rather than hands back (pages handed back fault when touched
    # again), where the tasks run on this thread: _KEPT_TASKS tasks' memory (float64 values, see _task_shape).
    # Not on worker threads: their heaps grow and shrink by themselves, so it gained nothing there, and a
    # 5 Hz file of 8 ch x 480 s then peaked at 925 MiB (852-892 MiB trimmed after every task)
    kept_here = _kept_bytes(budget, [est.memory_per_sample]) if n_workers == 1 and cluster is None else 0.0
    scan = scan_recording(rec, channels, chunk=chunk, progress=progress)
    model = fit_recording_stimulation(rec, channels, scan, stim_freq=stim_freq, monitor=monitor)
    _release_memory(kept_here)  # the stimulation fit's spectra grow with the recording
    names = [rec.channel_names[i] for i in channels]
    if not model.blocks:
        hint = f" near {stim_freq} Hz" if stim_freq else ""
        warnings.warn(f"no stimulation found{hint}: the output is a copy of the input. If the frequency "
                      "hint may be wrong, run `artifactclean survey` without it", stacklevel=2)
    if np.any(scan.std == 0):
        flat = [names[k] for k in np.flatnonzero(scan.std == 0)]
        warnings.warn(f"flat (constant) channel(s) {', '.join(flat)}: copied as they are", stacklevel=2)
    if gain_uv is None:
        gain_uv = 0.195
        if isinstance(rec, NeoRecording) and np.issubdtype(rec.raw_dtype, np.integer):
            g = rec.gains[channels] * rec._to_uv[channels]
            if np.allclose(g, g[0]) and g[0] > 0:
                gain_uv = float(g[0])
    rails = scan.rails
    n = rec.n_samples
    stretches: list[dict] = []
    reports = []
    client, own_client = open_client(cluster)
    pool = None
    # the input's SHA-256 for the provenance, read beside the cleaning (hashlib releases the GIL)
    hasher = ThreadPoolExecutor(max_workers=1) if source is not None else None
    checksum = hasher.submit(_checksum, source) if hasher is not None else None
    try:
        if client is not None:
            check_cluster(client)
            src = RecordingSpec.of(rec)
            submit_fn = lambda fn, *a: client.submit(fn, *a, pure=False)  # noqa: E731
            n_workers = client_threads(client) if workers == 1 else n_workers
        elif n_workers > 1:
            src = LockedReader(rec)
            pool = ThreadPoolExecutor(max_workers=n_workers)
            submit_fn = pool.submit
        else:
            src = LockedReader(rec)
            submit_fn = _run_now
        read_all = src.read if isinstance(src, LockedReader) else rec.read
        if hasattr(est, "prepare"):
            # block-level decisions from the same stretch an array run would use, on all channels,
            # planned on the worker threads (the reader is locked); a row estimator's choices run
            # its passes over up to 20 s of every channel, so they report progress too
            base_map = map if pool is None else pool.map
            # jobs done of those mapped so far, over all of prepare's maps (a block plan maps several times):
            # one progress line, completed once prepare returns
            planned = [0, 0]

            def planning_map(fn, items):
                items = list(items)
                planned[1] += len(items)
                out = []
                for res in base_map(fn, items):
                    out.append(res)
                    planned[0] += 1
                    if progress:
                        progress(planned[0], planned[1] + 1, "planning")
                return out

            est.prepare(lambda a, b, rows=None: read_all(a, b, channels if rows is None else [channels[i] for i in rows]),
                        model, fs, mapper=planning_map)
            if progress:
                progress(1, 1, "planning")
            # the plans' temporaries stay in this thread's heap unless handed back: the worker
            # threads allocate from heaps of their own (8 ch x 480 s, 2 workers: 1070 -> 960 MiB peak)
            _release_memory(kept_here)
        # the groups and the pieces' span from the plans' contexts, and the channels that judge a DAC
        # grid's tick edges (fitted once a piece by a task of their own) counted in the budget: with both
        # left out, 2 workers on an 8 ch x 480 s file peaked at 1049 MiB
        work = est.work_ranges(model, fs)
        ctx_max = max([_context(est, blk, model, fs) for _, _, blk in work] or [0])
        held = max([len(est.edge_judges(blk)) for _, _, blk in work] or [0]) if hasattr(est, "edge_judges") else 0
        per_sample = [est.block_memory_per_sample(blk) for _, _, blk in work] or [est.memory_per_sample]
        per_group, span = _task_shape(len(channels), budget // 4, max(budget // 4, 4 * ctx_max, 1), held,
                                      (max(a for a, _ in per_sample), max(b for _, b in per_sample)))
        groups = channel_groups(len(channels), max(n_workers, -(-len(channels) // per_group)))
        keep = _kept_bytes(budget, per_sample) if kept_here else 0.0  # the blocks' own memory per sample
        cuts = _context_cuts(work, lambda blk: _context(est, blk, model, fs), span, fs)
        # every cut is recorded; the run warns below two thirds of the declared context (the template's
        # three passes; 4 ch x 240 s, the file against the whole array: keeping 0.73-0.74 of it gave 4e-8
        # to 8e-8 of the range, 0.56 1e-5, 0.50 5e-5 and 0.38 3e-4, a few microvolts)
        if any(c["kept_s"] < _CUT_WARN * c["context_s"] for c in cuts):
            _warn_context_cuts(cuts, method, max_range_s, held, per_sample, fs)
        writer = open_writer(output, fs, names, n, gain_uv=gain_uv, groups=groups) \
            if Path(output).suffix.lower() != ".nix" else open_writer(output, fs, names, n, groups=groups)
        with writer:
            def note_lost(lost, a, rows):
                # lost samples of channels `rows` (indices into names), starting at sample a
                for j in np.flatnonzero(lost.any(axis=1)):
                    for s0, s1 in mask_runs(lost[j]):
                        stretches.append(dict(channel=names[rows[j]], start_s=(a + s0) / fs, stop_s=(a + s1) / fs))

            def emit(y, lost, a):
                writer.write(y)
                note_lost(lost, a, range(len(names)))
                if progress:
                    progress(a + y.shape[1], n, "cleaning")

            def copy(a0, b0):
                for a, b in _chunks(a0, b0, chunk):
                    x = read_all(a, b, channels)
                    lost = find_clipped(x, clip_level=rails)
                    x[lost] = 0.0
                    emit(x, lost, a)

            def items():
                pos = 0
                for s, e, blk in work:
                    if s > pos:
                        yield "copy", (pos, s)
                    pieces = _pieces(s, e, _context(est, blk, model, fs), span)
                    # where a DAC's tick edges are judged on channels other groups need (the plan's judges), they
                    # are fitted once per piece and their keys handed to every group (edge_keys_task); a piece's
                    # judges are submitted before the groups of the piece before it, so threads rarely wait
                    judges = est.edge_judges(blk) if hasattr(est, "edge_judges") and len(groups) > 1 else []
                    n_judged = 0  # pieces whose judges are submitted: up to the one after the piece at hand
                    for i, piece in enumerate(pieces):
                        while judges and n_judged < min(i + 2, len(pieces)):
                            yield "task", ("judges", pieces[n_judged], judges)
                            n_judged += 1
                        for k in range(len(groups)):
                            yield "task", piece + (k, bool(judges))
                    pos = e
                if pos < n:
                    yield "copy", (pos, n)

            judged: dict = {}  # each piece's judges' task, until its last group is submitted

            def submit(item):
                if item[0] == "judges":
                    (lo_, hi_, _, _), judges = item[1:]
                    sub, fit = est.for_channels(judges)
                    judged[lo_, hi_] = f = submit_fn(edge_keys_task, src, [channels[i] for i in fit], lo_, hi_, sub,
                                                     model.window(lo_, hi_), subset_clip(rails, fit), fs)
                    return f
                lo_, hi_, a, b, k, shared = item
                # a fresh clone per task: tasks of consecutive pieces run at once
                sub, fit = est.for_channels(groups[k], shared_edges=shared)
                keys = (judged.pop if k == len(groups) - 1 else judged.get)((lo_, hi_)) if shared else None
                return submit_fn(piece_task, src, [channels[i] for i in fit], len(groups[k]), lo_, hi_, a, b,
                                 sub, model.window(lo_, hi_), subset_clip(rails, fit), fs, keys)

            # tasks submitted ahead keep the workers busy while results are written
            ahead = 1 if submit_fn is _run_now else 2 * n_workers
            for kind, item, result in ordered_results(items(), submit, ahead):
                if kind == "copy":
                    copy(*item)
                    continue
                if item[0] == "judges":
                    continue  # handed to the piece's groups
                _, _, a, b, k, _ = item
                y, lost, rep = result
                del result
                g = groups[k]
                reports.append(dict(channels=[names[i] for i in g], start_s=a / fs, stop_s=b / fs, **rep))
                writer.write_group(k, y)
                note_lost(lost, a, g)
                if progress and k == len(groups) - 1:
                    progress(b, n, "cleaning")
                del y, lost
                _release_memory(keep)
            meta = dict(
                provenance=dict(
                    artifactclean_version=__version__,
                    method=method,
                    params=est.get_params(),
                    estimator_report=reports,
                    stimulation=model.to_dict(),
                    input=checksum.result() if checksum is not None else dict(path=rec.source),
                    channels=names,
                    created_utc=_dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds"),
                    command=command,
                    workers=n_workers,
                    channel_groups=[[names[i] for i in g] for g in groups],
                    cluster=None if client is None else str(client.scheduler.address),
                    max_range_s=max_range_s,
                    context_cut=cuts,
                ),
                clipped_stretches=_merge(stretches),
            )
            written = writer.close(meta)
    finally:
        if pool is not None:
            pool.shutdown(wait=True, cancel_futures=True)
        if hasher is not None:
            hasher.shutdown(wait=True, cancel_futures=True)
        if own_client:
            client.close()
    return dict(written=[str(p) for p in written], stimulation=model.to_dict(), context_cut=cuts,
                clipped_stretches=meta["clipped_stretches"], saturated=getattr(writer, "saturated", 0),
                gain_uv=gain_uv if Path(output).suffix.lower() != ".nix" else None)


class _Done:
    """A finished task, for the single-worker path (computed when submitted)."""

    def __init__(self, value):
        self._value = value

    def result(self):
        return self._value


def _run_now(fn, *args):
    return _Done(fn(*args))


def _context(est, blk, model, fs: float) -> int:
    """Samples of context the estimator declares for a work range (its block's frequency)."""
    if blk is not None and hasattr(est, "block_context_seconds"):
        return int(np.ceil(est.block_context_seconds(blk) * fs))  # the block's plan may widen it
    f_ctx = blk.freq_hz if blk is not None else (model.main_block.freq_hz if model.main_block else 1.0)
    return int(np.ceil(est.context_seconds(f_ctx) * fs))


def _task_shape(n_ch: int, length: int, least: int, held: int, per_sample: tuple[float, float]) -> tuple[int, int]:
    """Channels per group and samples of time per piece, from the memory of ``length`` samples of 4 channels.

    A task's memory is ``span * (a * channels + b)`` float64 values (``a, b``
    the estimator's :attr:`~artifactclean.estimators.ArtifactEstimator.memory_per_sample`:
    per channel, and per sample of time whatever the channels), where a
    task holds at least ``held`` channels (a DAC piece's judges, fitted by a
    task of their own: :func:`artifactclean.parallel.edge_keys_task`). The
    group is the largest whose span still reaches ``least`` samples (a piece
    of four contexts, at least ``length``), else one channel. Counting
    channels only, one channel got four times the span, and a 5 or 10 Hz
    task (one channel, 120 s) held 2.6 times the memory of a 20 Hz one (4
    channels, 30 s): the template's arrays shared by all channels held 21
    values per sample (5.5 now), a channel 4.7.
    The span depends on neither the worker count nor the recording's
    length, so the pieces (and the output, to the bit) do not either.
    """
    a, b = per_sample
    memory = length * (4 * a + b)

    def span_of(g: int) -> int:
        return max(1, int(memory / (a * max(g, held) + b) * (1 + 1e-12)))  # 4 channels: length, not one less

    fits = [g for g in range(1, n_ch + 1) if span_of(g) >= least]
    g = max(fits) if fits else 1
    return g, span_of(g)


#: share of the declared context below which a run warns that pieces differ from the whole array
_CUT_WARN = 2 / 3


def _context_cuts(work, context_of, span: int, fs: float) -> list[dict]:
    """Work ranges cleaned in pieces whose context is shorter than the estimator declares.

    ``context_of(blk)`` gives the declared context in samples. One dict per
    such range: where it starts, its frequency, the context declared and the
    context kept (s), and how many piece edges it has.
    """
    out = []
    for s, e, blk in work:
        ctx = context_of(blk)
        pieces = _pieces(s, e, ctx, span)
        if len(pieces) < 2:
            continue
        kept = min(ctx, _piece_length(ctx, span) // 4)
        if kept < ctx:
            out.append(dict(start_s=s / fs, stop_s=e / fs, freq_hz=None if blk is None else blk.freq_hz,
                            context_s=ctx / fs, kept_s=kept / fs, piece_edges=len(pieces) - 1))
    return out


def _warn_context_cuts(cuts, method, max_range_s, held, per_sample, fs) -> None:
    """Say where pieces were cut short of their context, and the ``max_range_s`` that avoids it.

    A one-channel group's span is ``max_range_s * fs * (4a + b) / (a max(1,
    held) + b)`` (:func:`_task_shape`); a piece keeps its whole context
    when twice the span holds four contexts, and a range shorter than four
    contexts is one piece when twice the span holds it.
    """
    a = max(p[0] for p in per_sample)
    b = max(p[1] for p in per_sample)
    per_span = (a * max(1, held) + b) / (4 * a + b)  # seconds of max_range_s per second of span

    def need_of(c):
        ctx, length = c["context_s"], c["stop_s"] - c["start_s"]
        # the whole context in every piece, or one piece for the whole range where it holds four contexts
        return min(2 * ctx, length / 2 if 4 * ctx >= length else np.inf) * per_span

    need = float(np.ceil(max(need_of(c) for c in cuts)))
    mib = need * fs * (4 * a + b) * 8 / 2**20
    where = ", ".join(("" if c["freq_hz"] is None else f"{c['freq_hz']:g} Hz ")
                      + f"from {c['start_s']:.0f} s ({c['piece_edges']} edges, {c['kept_s']:.1f} of "
                      f"{c['context_s']:.1f} s)" for c in cuts[:4])
    more = f" and {len(cuts) - 4} more" if len(cuts) > 4 else ""
    warnings.warn(
        f"'{method}' needs more context than pieces of max_range_s={max_range_s:g} hold: {where}{more}. "
        f"Near those piece edges the output may differ from cleaning the whole array at once (with half "
        f"the context, 5e-5 of the range). For the whole-array result, raise max_range_s to {need:g} "
        f"(command line: --task-seconds {need:g}); a task then holds about {mib:.0f} MiB per worker",
        stacklevel=3)


def _piece_length(ctx: int, span: int) -> int:
    """Samples a piece reads: at least four contexts, up to twice ``span`` (see :func:`_pieces`)."""
    return min(max(span, 4 * ctx), 2 * span)


def _pieces(s: int, e: int, ctx: int, span: int) -> list[tuple[int, int, int, int]]:
    """``(lo, hi, a, b)`` per piece of the work range ``s..e``: read ``lo..hi``, keep ``a..b``.

    A piece holds at least twice its context as core, up to twice ``span``;
    where the context is longer than that (low frequencies, one channel per
    group) it is cut to a quarter of the piece, and pieces then differ from a
    whole-array run near their edges (:func:`_context_cuts` finds where).
    """
    piece_len = _piece_length(ctx, span)
    ctx = min(ctx, piece_len // 4)
    if e - s <= piece_len:
        return [(s, e, s, e)]
    # every piece but the last reads piece_len samples (core plus context), whatever
    # the block's length, so memory follows the piece and not the recording
    out, a = [], s
    while a < e:
        lo_ = max(s, a - ctx)
        b = min(e, lo_ + piece_len - ctx)
        out.append((lo_, min(e, b + ctx), a, b))
        a = b
    return out


def _release_memory(keep: float = 0.0) -> None:
    """Hand freed heap memory back to the system (glibc) once the heap holds more than ``keep`` bytes of it.

    Peak memory then follows the pieces' size, not how many pieces came
    before, while up to ``keep`` freed bytes stay for the next tasks to
    reuse: memory handed back costs a page fault a page when touched again.
    Where glibc cannot say how much it holds (``mallinfo2``, glibc 2.33 and
    later), everything is handed back; elsewhere (not glibc), nothing.
    """
    global _TRIM, _HELD
    if _TRIM is None:
        try:
            import ctypes

            libc = ctypes.CDLL("libc.so.6")
            _TRIM = libc.malloc_trim
        except (OSError, AttributeError):
            _TRIM = False
        else:
            try:
                class _Info(ctypes.Structure):  # struct mallinfo2 of glibc's malloc.h
                    _fields_ = [(n, ctypes.c_size_t) for n in ("arena", "ordblks", "smblks", "hblks", "hblkhd",
                                                               "usmblks", "fsmblks", "uordblks", "fordblks",
                                                               "keepcost")]

                libc.mallinfo2.restype = _Info
                _HELD = lambda: libc.mallinfo2().fordblks  # noqa: E731  (free bytes of all arenas)
            except AttributeError:
                _HELD = None
    if _TRIM and (keep <= 0 or _HELD is None or _HELD() > keep):
        _TRIM(0)


_TRIM = None
_HELD = None
#: tasks' memory (each ``_task_shape``'s) the heap may keep free between a file's tasks. A file of 8 ch x 120 s
#: at 20 Hz on 1 worker, trimmed after every task: 260-280 thousand page faults, 1.0-1.35 s of system time,
#: 7.0-8.4 s; keeping one task's memory, half the tasks still trimmed (the freed blocks lie scattered); two:
#: 80-90 thousand faults, 0.65-0.75 s, 6.6-8.1 s (medians 7.5 -> 7.1 s in six fresh runs each), and 20 MiB
#: more at the peak (this project's measure)
_KEPT_TASKS = 2


def _kept_bytes(budget: int, per_sample) -> float:
    """Bytes of :data:`_KEPT_TASKS` tasks of ``budget`` samples (4 channels x time; ``per_sample``: the
    ``(a, b)`` of each work range, the largest counted), as :func:`_task_shape` counts a task."""
    return 8.0 * _KEPT_TASKS * (budget // 4) * max(4 * a + b for a, b in per_sample)


def _merge(stretches: list[dict]) -> list[dict]:
    """Join stretches of one channel that touch across chunk edges."""
    out: list[dict] = []
    last: dict = {}
    for s in sorted(stretches, key=lambda d: (d["channel"], d["start_s"])):
        prev = last.get(s["channel"])
        if prev is not None and s["start_s"] <= prev["stop_s"] + 1e-12:
            prev["stop_s"] = max(prev["stop_s"], s["stop_s"])
        else:
            d = dict(s)
            out.append(d)
            last[s["channel"]] = d
    return out


def _warn_other_segments(rec, stacklevel: int = 3) -> None:
    """A file with gaps holds several segments; one is read at a time, and the others must not go unnoticed."""
    n_seg = getattr(rec, "n_segments", 1)
    if n_seg > 1:
        others = ", ".join(str(k) for k in range(n_seg) if k != rec.segment)
        warnings.warn(f"{rec.source} holds {n_seg} segments (the recording stopped and restarted); only segment "
                      f"{rec.segment} is read here. Run again with --segment {others} (segment= in Python) "
                      "for the rest", stacklevel=stacklevel)


@one_blas_thread
def survey_recording(rec: Recording, *, channels: Sequence[int] | None = None, stim_freq: float | None = None,
                     monitor: tuple[Recording, int] | None = None, progress: Progress | None = None) -> dict:
    """What to know before cleaning: blocks, refined frequencies, drift, per-channel artifact and clipping."""
    if channels is None:
        channels = [i for i in range(rec.n_channels) if monitor is None or monitor[0] is not rec or i != monitor[1]]
    channels = list(channels)
    _warn_other_segments(rec)
    scan = scan_recording(rec, channels, progress=progress)
    model = fit_recording_stimulation(rec, channels, scan, stim_freq=stim_freq, monitor=monitor)
    main = model.main_block
    amps = np.full(len(channels), np.nan)
    if main is not None:
        # amplitude of the fundamental per channel over up to 2 s in the middle of the main plateau
        mid = (main.ramp_up_stop + main.ramp_down_start) // 2
        half = int(min(1.0 * rec.fs, max(1, (main.ramp_down_start - main.ramp_up_stop) // 2)))
        a, b = max(main.start, mid - half), min(main.stop, mid + half)
        x = rec.read(a, b, channels)
        u = model.cycles(main, a, b)
        amps = 2 * np.abs((x - x.mean(axis=1, keepdims=True)) @ np.exp(-2j * np.pi * u)) / max(b - a, 1)
        strongest = int(np.argmax(amps))
        up = make_estimator(DEFAULT_METHOD)._upsampling(main.freq_hz, rec.fs)
        if up > 1:
            # the default method's own rule: at so few samples a cycle the samples themselves repeat like ticks,
            # and a DAC's steps could not be resolved; its images are harmonics of the cycle (resampling.py)
            grid, steps, free = None, 0.0, None
        else:
            grid = find_dac_grid(x[strongest], u, rec.fs, main.freq_hz)
            steps = step_rate(x[strongest], rec.fs)
            if grid is None and steps > 50.0:
                grid = find_dac_period(x[strongest], u, rec.fs, main.freq_hz)
            free = grid is None and steps > 50.0 and find_dac_clock(x[strongest], u, rec.fs, main.freq_hz)
        dac = dict(ticks_per_cycle=None if grid is None else grid.ticks_per_cycle,
                   cycles_per_period=None if grid is None else grid.cycles_per_period,
                   updates_per_cycle=float(free.ticks_per_cycle) if free else None,
                   steps_per_s=steps, locked=grid is not None)
    else:
        up = 1
        dac = dict(ticks_per_cycle=None, cycles_per_period=None, updates_per_cycle=None, steps_per_s=0.0, locked=False)
    unlocked = not dac["locked"] and dac["updates_per_cycle"] is None and dac["steps_per_s"] > 50.0
    frac = scan.n_at_rails / max(scan.n_samples, 1)
    chans = []
    for k, ch in enumerate(channels):
        rec_method = "template"
        notes = []
        if frac[k] > 0:
            notes.append(f"{100 * frac[k]:.2f}% of samples clipped: reported and blanked")
        if unlocked:
            notes.append("DAC staircase not locked to the cycle: spike-band residual expected")
        note = "; ".join(notes)
        chans.append(dict(name=rec.channel_names[ch], index=int(ch), artifact_amplitude_uv=float(amps[k]),
                          sd_uv=float(scan.std[k]), clipped_fraction=float(frac[k]),
                          recommended_method=rec_method, note=note))
    events = [dict(time_s=e.time_s, duration_s=e.duration_s, label=e.label, channel=e.channel)
              for e in getattr(rec, "events", [])]
    return dict(
        input=rec.source,
        sampling_rate_hz=rec.fs,
        n_samples=rec.n_samples,
        duration_s=rec.n_samples / rec.fs,
        stimulation=dict(frequency_hz=None if main is None else main.freq_hz,
                         nominal_freq_hz=stim_freq, reference=model.reference, blocks=model.block_table(),
                         dac=dac, upsampled_by=up),
        channels=chans,
        events=events,
    )
