"""Reading recordings: any neo rawio format by path, numpy arrays, neo objects.

A :class:`Recording` exposes a lazy header (sampling rate, length, channel
names) and reads chunks on demand in microvolts; it never loads a whole file
to read a part. File recordings go through neo's rawio layer
(``parse_header`` then ``get_analogsignal_chunk``), with gains and offsets
from the file and units converted with ``quantities``.
"""

from __future__ import annotations

import os
from dataclasses import dataclass
from pathlib import Path
from typing import Sequence

import numpy as np
import quantities as pq

__all__ = ["Recording", "ArrayRecording", "NeoRecording", "open_recording", "rawio_class"]


@dataclass
class Event:
    """A time-stamped marker from the file (TTL, annotation, epoch)."""

    time_s: float
    duration_s: float
    label: str
    channel: str


class Recording:
    """Common interface: ``fs``, ``n_samples``, ``channel_names``, ``read(start, stop, channels)``."""

    fs: float
    n_samples: int
    channel_names: list
    source: str = "array"
    events: list

    def read(self, start: int = 0, stop: int | None = None, channels: Sequence[int] | None = None) -> np.ndarray:
        """Samples ``start..stop`` of ``channels`` (indices) in microvolts, shape (n_channels, n)."""
        raise NotImplementedError

    @property
    def n_channels(self) -> int:
        return len(self.channel_names)

    def channel_index(self, name_or_index) -> int:
        """Index of a channel given by name or index; the error lists what exists."""
        if isinstance(name_or_index, (int, np.integer)) or (isinstance(name_or_index, str) and name_or_index.isdigit()
                                                           and name_or_index not in self.channel_names):
            i = int(name_or_index)
            if not 0 <= i < self.n_channels:
                raise ValueError(f"channel index {i} out of range 0..{self.n_channels - 1}")
            return i
        if name_or_index in self.channel_names:
            return self.channel_names.index(name_or_index)
        raise ValueError(f"no channel named {name_or_index!r}; channels are: {', '.join(map(str, self.channel_names))}")

    def _bounds(self, start, stop):
        stop = self.n_samples if stop is None else min(int(stop), self.n_samples)
        start = max(0, int(start))
        if stop < start:
            raise ValueError(f"empty read: start {start} > stop {stop}")
        return start, stop


class ArrayRecording(Recording):
    """A numpy array (n_channels, n_samples) in microvolts, seen as a recording."""

    def __init__(self, data, fs: float, channel_names: Sequence[str] | None = None, events=None):
        arr = np.asarray(data)
        if arr.ndim == 1:
            arr = arr[None, :]
        if arr.ndim != 2:
            raise ValueError(f"array recordings are (n_channels, n_samples), got shape {arr.shape}")
        self._data = arr
        self.fs = float(fs)
        self.n_samples = arr.shape[1]
        self.channel_names = list(channel_names) if channel_names is not None else [f"ch{i}" for i in range(arr.shape[0])]
        self.events = list(events or [])
        self.source = "array"

    def read(self, start=0, stop=None, channels=None):
        start, stop = self._bounds(start, stop)
        rows = slice(None) if channels is None else list(channels)
        return np.array(self._data[rows, start:stop], dtype=np.float64)


def rawio_class(path: Path, format: str | None = None):
    """The neo rawio class for ``path``: named by ``format``, or guessed.

    ``format`` is a rawio class name with or without the ``RawIO`` suffix,
    any case (``"OpenEphysBinary"``, ``"brainvision"``...).
    """
    import neo.rawio as nr

    names = {c.__name__.lower(): c for c in nr.rawiolist}
    if format is not None:
        key = format.lower()
        cls = names.get(key) or names.get(key + "rawio")
        if cls is None:
            options = ", ".join(sorted(c.__name__[:-5] for c in nr.rawiolist))
            raise ValueError(f"unknown format {format!r}; neo reads: {options}")
        return cls
    if path.is_dir():
        if any(path.rglob("structure.oebin")):
            return nr.OpenEphysBinaryRawIO
        raise ValueError(f"cannot tell the format of directory {path}; name it with --format")
    cls = nr.get_rawio(str(path))
    if cls is None:
        raise ValueError(f"cannot tell the format of {path.name!r} from its suffix; name it with --format")
    return cls


class NeoRecording(Recording):
    """A file read lazily through a neo rawio reader.

    Parameters
    ----------
    path : str or Path
    format : str, optional
        rawio class name; guessed from the path when None.
    stream : str or int, optional
        Signal stream by name, id or index (default: the first stream).
    block, segment : int
    """

    def __init__(self, path, format: str | None = None, stream=None, block: int = 0, segment: int = 0):
        path = Path(path)
        if not path.exists():
            raise FileNotFoundError(f"no such file or directory: {path}")
        cls = rawio_class(path, format)
        kw = {"dirname": str(path)} if path.is_dir() else {"filename": str(path)}
        if cls.__name__ == "OpenEphysBinaryRawIO" and not path.is_dir():
            kw = {"dirname": str(path.parent)}
        try:
            self._r = cls(**kw)
            self._r.parse_header()
        except Exception as exc:  # neo raises many types for unreadable files
            raise ValueError(f"{cls.__name__[:-5]} reader cannot read {path}: {exc}") from exc
        h = self._r.header
        if h["nb_block"] <= block or h["nb_segment"][block] <= segment:
            raise ValueError(f"{path} has {h['nb_block']} block(s) with {list(h['nb_segment'])} segment(s); "
                             f"block {block}, segment {segment} does not exist")
        streams = h["signal_streams"]
        if len(streams) == 0:
            raise ValueError(f"{path} holds no analog signal streams")
        self.stream_index = self._pick_stream(streams, stream)
        self.stream_name = str(streams["name"][self.stream_index])
        self.block, self.segment = block, segment
        #: segments of this block: a recording that stopped and restarted (a gap) has several
        self.n_segments = int(h["nb_segment"][block])
        sid = streams["id"][self.stream_index]
        chans = h["signal_channels"][h["signal_channels"]["stream_id"] == sid]
        self.channel_names = [str(c) for c in chans["name"]]
        self._units = [str(u) for u in chans["units"]]
        self._to_uv = np.array([_uv_factor(u) for u in self._units])
        self.gains = np.asarray(chans["gain"], dtype=float)
        self.offsets = np.asarray(chans["offset"], dtype=float)
        self.raw_dtype = np.dtype(chans["dtype"][0])
        self.fs = float(self._r.get_signal_sampling_rate(stream_index=self.stream_index))
        self.n_samples = int(self._r.get_signal_size(block, segment, stream_index=self.stream_index))
        self.t_start = float(self._r.get_signal_t_start(block, segment, stream_index=self.stream_index))
        self.path = path
        self.format = cls.__name__[:-5]
        self.source = str(path)
        self.events = self._read_events()

    @staticmethod
    def _pick_stream(streams, stream) -> int:
        if stream is None:
            return 0
        names = [str(s) for s in streams["name"]]
        ids = [str(s) for s in streams["id"]]
        if isinstance(stream, (int, np.integer)) or (isinstance(stream, str) and stream.isdigit() and stream not in ids):
            i = int(stream)
            if 0 <= i < len(names):
                return i
        elif str(stream) in names:
            return names.index(str(stream))
        elif str(stream) in ids:
            return ids.index(str(stream))
        listing = ", ".join(f"{i}: {n!r} (id {d!r})" for i, (n, d) in enumerate(zip(names, ids)))
        raise ValueError(f"no stream {stream!r}; streams are {listing}")

    def _read_events(self) -> list:
        out = []
        h = self._r.header
        for k, ch in enumerate(h["event_channels"]):
            n = self._r.event_count(self.block, self.segment, k)
            if n == 0:
                continue
            ts, dur, labels = self._r.get_event_timestamps(self.block, self.segment, event_channel_index=k)
            t = self._r.rescale_event_timestamp(ts, dtype="float64", event_channel_index=k)
            d = (self._r.rescale_epoch_duration(dur, dtype="float64", event_channel_index=k)
                 if dur is not None else np.zeros_like(t))
            for ti, di, li in zip(t, d, labels):
                out.append(Event(float(ti) - self.t_start, float(di), str(li), str(ch["name"])))
        return out

    def read(self, start=0, stop=None, channels=None):
        start, stop = self._bounds(start, stop)
        idx = None if channels is None else list(channels)
        raw = self._r.get_analogsignal_chunk(block_index=self.block, seg_index=self.segment, i_start=start,
                                             i_stop=stop, stream_index=self.stream_index, channel_indexes=idx)
        val = self._r.rescale_signal_raw_to_float(raw, dtype="float64", stream_index=self.stream_index,
                                                  channel_indexes=idx)
        val *= self._to_uv if idx is None else self._to_uv[idx]  # in place: one array of the piece's size fewer
        return np.ascontiguousarray(val.T)

    def rails_uv(self) -> tuple[np.ndarray, np.ndarray] | None:
        """Signal values (uV) of the raw integer type's extremes, per channel, or None for float data."""
        if not np.issubdtype(self.raw_dtype, np.integer):
            return None
        info = np.iinfo(self.raw_dtype)
        hi = (info.max * self.gains + self.offsets) * self._to_uv
        lo = (info.min * self.gains + self.offsets) * self._to_uv
        return np.maximum(hi, lo), np.minimum(hi, lo)


def _uv_factor(units: str) -> float:
    """Factor from ``units`` to microvolts (``quantities``); unitless is taken as uV with a warning."""
    u = (units or "").strip()
    if u == "" or u.lower() in ("dimensionless", "a.u.", "au"):
        import warnings

        warnings.warn("channel units are missing: values are taken as microvolts", stacklevel=3)
        return 1.0
    try:
        return float(pq.Quantity(1.0, u).rescale(pq.uV).magnitude)
    except Exception as exc:
        raise ValueError(f"channel units {units!r} are not a voltage; cannot convert to microvolts") from exc


def open_recording(source, *, fs: float | None = None, format: str | None = None, stream=None,
                   block: int = 0, segment: int = 0) -> Recording:
    """Open a recording from a path (any neo rawio format), a numpy array or a neo AnalogSignal.

    Parameters
    ----------
    source : str, Path, ndarray, neo.AnalogSignal or Recording
    fs : float
        Sampling rate, required for arrays.
    format, stream, block, segment
        For files (see :class:`NeoRecording`).
    """
    if isinstance(source, Recording):
        return source
    if isinstance(source, (str, os.PathLike)):
        return NeoRecording(source, format=format, stream=stream, block=block, segment=segment)
    import neo

    if isinstance(source, neo.AnalogSignal):
        data = source.rescale(pq.uV).magnitude.T
        names = source.array_annotations.get("channel_names")
        return ArrayRecording(data, float(source.sampling_rate.rescale(pq.Hz).magnitude),
                              None if names is None else [str(n) for n in names])
    if fs is None:
        raise TypeError("an array recording needs fs= (Hz)")
    return ArrayRecording(source, fs)
