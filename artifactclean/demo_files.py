"""Write synthetic recordings in real acquisition formats (for the demo, examples and tests).

Layouts are the ones neo's rawio readers take: Open Ephys binary (a
``structure.oebin`` JSON, ``continuous.dat`` int16 samples x channels and
``sample_numbers.npy``; TTL events as ``.npy`` files) and BrainVision
(``.vhdr`` header, ``.vmrk`` markers, ``.eeg`` multiplexed int16). The data
are invented: they exist to exercise the readers and the commands.
"""

from __future__ import annotations

import json
from pathlib import Path
from typing import Sequence

import numpy as np

__all__ = ["write_openephys_binary", "write_brainvision", "to_int16"]


def to_int16(data_uv: np.ndarray, gain_uv: float) -> np.ndarray:
    """Quantise microvolts to int16 codes of ``gain_uv``, clamped at the int16 range."""
    return np.clip(np.rint(data_uv / gain_uv), -32768, 32767).astype("<i2")


def write_openephys_binary(
    dirname,
    data_uv: np.ndarray,
    fs: float,
    *,
    gain_uv: float = 0.195,
    channel_names: Sequence[str] | None = None,
    ttl_times_s: Sequence[float] = (),
    ttl_states: Sequence[int] | None = None,
) -> Path:
    """Write ``data_uv`` (n_channels, n_samples) as an Open Ephys binary recording under ``dirname``.

    Returns the top directory (what ``NeoRecording`` opens).
    """
    root = Path(dirname)
    rec = root / "Record Node 101" / "experiment1" / "recording1"
    folder = "Acq-100.example"
    cont = rec / "continuous" / folder
    cont.mkdir(parents=True, exist_ok=False)
    n_ch, n = data_uv.shape
    names = list(channel_names) if channel_names is not None else [f"CH{i + 1}" for i in range(n_ch)]
    to_int16(data_uv, gain_uv).T.tofile(cont / "continuous.dat")
    np.save(cont / "sample_numbers.npy", np.arange(n, dtype=np.int64))
    np.save(cont / "timestamps.npy", np.arange(n, dtype=np.float64) / fs)
    meta = {
        "GUI version": "0.6.0",
        "continuous": [{
            "folder_name": folder + "/", "sample_rate": fs, "source_processor_name": "Acq",
            "source_processor_id": 100, "stream_name": "example", "recorded_processor": "Acq",
            "recorded_processor_id": 100, "num_channels": n_ch,
            "channels": [{"channel_name": nm, "description": "", "identifier": "", "history": "",
                          "bit_volts": gain_uv, "units": "uV"} for nm in names],
        }],
        "events": [],
        "spikes": [],
    }
    if len(ttl_times_s):
        ev = rec / "events" / folder / "TTL"
        ev.mkdir(parents=True)
        t = np.asarray(ttl_times_s, dtype=np.float64)
        states = np.asarray(ttl_states if ttl_states is not None else [1 if i % 2 == 0 else -1 for i in range(t.size)],
                            dtype=np.int16)
        np.save(ev / "timestamps.npy", t)
        np.save(ev / "sample_numbers.npy", np.round(t * fs).astype(np.int64))
        np.save(ev / "states.npy", states)
        np.save(ev / "full_words.npy", np.abs(states).astype(np.uint64))
        meta["events"].append({
            "folder_name": folder + "/TTL/", "channel_name": "TTL Input", "description": "TTL events",
            "identifier": "", "sample_rate": fs, "type": "int16", "num_channels": 8,
            "source_processor": "Acq", "stream_name": "example",
        })
    (rec / "structure.oebin").write_text(json.dumps(meta, indent=2))
    return root


def write_brainvision(
    path,
    data_uv: np.ndarray,
    fs: float,
    *,
    resolution_uv: float = 0.1,
    channel_names: Sequence[str] | None = None,
    markers: Sequence[tuple[str, str, float]] = (),
) -> Path:
    """Write ``data_uv`` as BrainVision ``.vhdr`` + ``.vmrk`` + ``.eeg`` (int16, multiplexed).

    ``markers`` are ``(type, description, time_s)``. Choose ``fs`` so that
    ``1e6 / fs`` microseconds is exact (e.g. 20 or 25 kHz): the header
    stores the sampling interval.
    """
    path = Path(path).with_suffix(".vhdr")
    stem = path.stem
    n_ch, n = data_uv.shape
    names = list(channel_names) if channel_names is not None else [f"Ch{i + 1}" for i in range(n_ch)]
    to_int16(data_uv, resolution_uv).T.tofile(path.with_suffix(".eeg"))
    chan_lines = "\n".join(f"Ch{i + 1}={nm},,{resolution_uv},µV" for i, nm in enumerate(names))
    path.write_text(
        "Brain Vision Data Exchange Header File Version 1.0\n\n[Common Infos]\nCodepage=UTF-8\n"
        f"DataFile={stem}.eeg\nMarkerFile={stem}.vmrk\nDataFormat=BINARY\nDataOrientation=MULTIPLEXED\n"
        f"NumberOfChannels={n_ch}\nSamplingInterval={1e6 / fs:g}\n\n[Binary Infos]\nBinaryFormat=INT_16\n\n"
        f"[Channel Infos]\n{chan_lines}\n",
        encoding="utf-8",
    )
    mk = ["Mk1=New Segment,,1,1,0"]
    for i, (typ, desc, t) in enumerate(markers, start=2):
        mk.append(f"Mk{i}={typ},{desc},{int(round(t * fs)) + 1},1,0")
    path.with_suffix(".vmrk").write_text(
        "Brain Vision Data Exchange Marker File, Version 1.0\n\n[Common Infos]\nCodepage=UTF-8\n"
        f"DataFile={stem}.eeg\n\n[Marker Infos]\n" + "\n".join(mk) + "\n",
        encoding="utf-8",
    )
    return path
