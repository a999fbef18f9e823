"""Writing cleaned recordings: interleaved int16 for spike sorters, or NIX through neo.

Every writer writes to a hidden temporary name beside the destination and
renames it only when everything is written, so an interrupted run leaves no
partial file at the destination (``os.replace`` is atomic on one file
system).

``.dat`` / ``.bin``
    Interleaved int16, samples x channels, little-endian, and a JSON sidecar
    with the same stem (``rec.dat`` -> ``rec.json``): sampling rate, channel
    names, gain (uV per bit), offset, clipped stretches, provenance and the
    number of samples that saturated int16 (clamped, never wrapped).
``.nix``
    NIX written by neo's ``NixIO``: one AnalogSignal in microvolts
    (float32), the clipped stretches as an Epoch per channel, provenance as
    annotations. neo's NixIO writes a whole block at once, so this writer
    holds the cleaned signal in memory (4 bytes per sample); use ``.dat`` for
    recordings larger than memory.
"""

from __future__ import annotations

import json
import os
from pathlib import Path

import numpy as np

__all__ = ["output_paths", "DatWriter", "NixWriter", "open_writer", "SUFFIXES"]

SUFFIXES = (".dat", ".bin", ".nix")


def output_paths(path: Path) -> list[Path]:
    """Every file a write to ``path`` creates."""
    path = Path(path)
    if path.suffix.lower() in (".dat", ".bin"):
        return [path, path.with_suffix(".json")]
    return [path]


def _temp(path: Path) -> Path:
    return path.with_name(f".{path.name}.partial-{os.getpid()}")


class _Writer:
    def __init__(self, path: Path, fs: float, channel_names, n_samples: int):
        self.path = Path(path)
        self.fs = float(fs)
        self.channel_names = [str(c) for c in channel_names]
        self.n_samples = int(n_samples)
        self.written = 0

    def __enter__(self):
        return self

    def __exit__(self, exc_type, exc, tb):
        if exc_type is not None:
            self.abort()
        return False

    def abort(self) -> None:
        for p in self._temps():
            try:
                p.unlink()
            except FileNotFoundError:
                pass

    def _temps(self) -> list[Path]:
        return [_temp(p) for p in output_paths(self.path)]


class DatWriter(_Writer):
    """Interleaved int16 samples x channels plus a JSON sidecar."""

    def __init__(self, path, fs, channel_names, n_samples, *, gain_uv: float = 0.195, offset_uv: float = 0.0):
        super().__init__(path, fs, channel_names, n_samples)
        if not gain_uv > 0:
            raise ValueError(f"gain must be positive (uV per bit), got {gain_uv}")
        self.gain_uv = float(gain_uv)
        self.offset_uv = float(offset_uv)
        self.saturated = 0
        self._tmp = _temp(self.path)
        self._fh = open(self._tmp, "wb")

    def write(self, chunk_uv: np.ndarray) -> None:
        """Append a chunk of shape (n_channels, n) in microvolts."""
        q = np.rint((chunk_uv - self.offset_uv) / self.gain_uv)
        over = (q > 32767) | (q < -32768)
        self.saturated += int(over.sum())
        np.clip(q, -32768, 32767, out=q)
        self._fh.write(np.ascontiguousarray(q.T).astype("<i2").tobytes())
        self.written += chunk_uv.shape[1]

    def close(self, meta: dict) -> list[Path]:
        """Finish: write the sidecar and move both files into place."""
        self._fh.close()
        side = dict(
            format="interleaved int16, samples x channels, little-endian",
            sampling_rate_hz=self.fs,
            n_channels=len(self.channel_names),
            n_samples=self.written,
            channel_names=self.channel_names,
            gain_uv_per_bit=self.gain_uv,
            offset_uv=self.offset_uv,
            saturated_samples=self.saturated,
            **meta,
        )
        side_path = self.path.with_suffix(".json")
        side_tmp = _temp(side_path)
        with open(side_tmp, "w") as fh:
            json.dump(side, fh, indent=2, default=_jsonable)
        os.replace(self._tmp, self.path)
        os.replace(side_tmp, side_path)
        return [self.path, side_path]

    def abort(self) -> None:
        if not self._fh.closed:
            self._fh.close()
        super().abort()


class NixWriter(_Writer):
    """NIX file through neo's NixIO (signal kept in memory as float32 until close)."""

    def __init__(self, path, fs, channel_names, n_samples, **_):
        super().__init__(path, fs, channel_names, n_samples)
        try:
            import nixio  # noqa: F401
        except ImportError as exc:
            raise ValueError("writing .nix needs the nixio package: pip install nixio") from exc
        self._buf = np.empty((self.n_samples, len(self.channel_names)), dtype=np.float32)

    def write(self, chunk_uv: np.ndarray) -> None:
        n = chunk_uv.shape[1]
        self._buf[self.written:self.written + n] = chunk_uv.T
        self.written += n

    def close(self, meta: dict) -> list[Path]:
        import neo
        import quantities as pq
        from neo.io import NixIO

        block = neo.Block(name="artifactclean output")
        seg = neo.Segment(name="cleaned")
        block.segments.append(seg)
        sig = neo.AnalogSignal(self._buf[: self.written], units=pq.uV, sampling_rate=self.fs * pq.Hz,
                               name="cleaned", array_annotations={"channel_names": np.array(self.channel_names)})
        seg.analogsignals.append(sig)
        stretches = meta.get("clipped_stretches", [])
        if stretches:
            t0 = np.array([s["start_s"] for s in stretches])
            dur = np.array([s["stop_s"] - s["start_s"] for s in stretches])
            labels = np.array([s["channel"] for s in stretches])
            seg.epochs.append(neo.Epoch(times=t0 * pq.s, durations=dur * pq.s, labels=labels, name="clipped"))
        # NIX annotations take plain values: nested provenance goes in as JSON text
        block.annotate(**{k: (json.dumps(v, default=_jsonable) if isinstance(v, (dict, list)) else v)
                          for k, v in meta.items() if k != "clipped_stretches" and v is not None})
        tmp = _temp(self.path)
        io = NixIO(str(tmp), mode="ow")
        try:
            io.write_block(block)
        finally:
            io.close()
        os.replace(tmp, self.path)
        return [self.path]


def open_writer(path, fs, channel_names, n_samples, **kw):
    """The writer for ``path``'s suffix (``.dat``, ``.bin`` or ``.nix``)."""
    suffix = Path(path).suffix.lower()
    if suffix in (".dat", ".bin"):
        return DatWriter(path, fs, channel_names, n_samples, **kw)
    if suffix == ".nix":
        return NixWriter(path, fs, channel_names, n_samples, **kw)
    raise ValueError(f"unknown output type {suffix or '(no suffix)'!r}; use one of {', '.join(SUFFIXES)}")


def _jsonable(v):
    if isinstance(v, np.integer):
        return int(v)
    if isinstance(v, np.floating):
        return float(v)
    if isinstance(v, np.ndarray):
        return v.tolist()
    if isinstance(v, Path):
        return str(v)
    return str(v)
