"""Cleaning a file against copying it, and peak memory against its length, as ratios from one run.

Builds Open Ephys binary recordings (int16, 30 kHz, one block at ``--freq``,
20 Hz by default, with a 1 kHz DAC staircase unless ``--no-dac``) of
``--seconds`` and of 4 times that, then, each in a
fresh process (so that peak memory is that of one job):

* a plain copy: the same reader, read in the same chunks, written by the same
  ``.dat`` writer, nothing cleaned;
* ``clean_recording`` with the default method.

Prints clean / copy throughput and the peak resident memory (``VmHWM``) of
each job, with the ratio of the 4x file to the 1x file.

    python benchmarks/files.py [--seconds 60] [--channels 8] [--workers 1] [--freq 20] [--no-dac]
"""

from __future__ import annotations

import argparse
import json
import subprocess
import sys
import tempfile
import time
from pathlib import Path


def _peak_kib() -> int:
    for line in open("/proc/self/status"):
        if line.startswith("VmHWM"):
            return int(line.split()[1])
    return -1  # pragma: no cover - not Linux


def _child(job: str, src: str, out: str, workers: int) -> None:
    import warnings

    import numpy as np

    from artifactclean.io import open_recording
    from artifactclean.io.pipeline import clean_recording
    from artifactclean.io.writers import open_writer

    rec = open_recording(src)
    t0 = time.perf_counter()
    if job == "copy":
        chunk = int(10.0 * rec.fs * min(1.0, 4 / rec.n_channels))  # the chunks clean_recording reads
        with open_writer(out, rec.fs, rec.channel_names, rec.n_samples, gain_uv=0.195) as w:
            for a in range(0, rec.n_samples, chunk):
                w.write(rec.read(a, min(rec.n_samples, a + chunk)))
            w.close({})
    else:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            clean_recording(rec, out, workers=workers, force=True)
    dt = time.perf_counter() - t0
    print(json.dumps(dict(seconds=dt, peak_kib=_peak_kib(), samples=int(rec.n_samples * rec.n_channels))))
    del np


def _run(job, src, out, workers=1) -> dict:
    r = subprocess.run([sys.executable, __file__, "--child", job, str(src), str(out), str(workers)],
                       capture_output=True, text=True)
    if r.returncode:
        raise RuntimeError(r.stderr)
    return json.loads(r.stdout.strip().splitlines()[-1])


def make_file(root: Path, seconds: float, channels: int, seed: int = 0, freq: float = 20.0, dac: bool = True) -> Path:
    from artifactclean.demo_files import write_openephys_binary
    from artifactclean.synthetic import ArtifactSpec, BlockSpec, NeuralSpec, simulate_recording

    rec = simulate_recording(seconds, artifact=ArtifactSpec(freq_hz=freq, dac_rate_hz=1000.0 if dac else None),
                             neural=NeuralSpec(units=[]), blocks=[BlockSpec(1.0, seconds - 1.0, ramp_s=1.0)],
                             n_channels=channels, seed=seed)
    return write_openephys_binary(root, rec.data, rec.fs)


def main(argv=None) -> dict:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--seconds", type=float, default=60.0)
    ap.add_argument("--channels", type=int, default=8)
    ap.add_argument("--workers", type=int, default=1)
    ap.add_argument("--freq", type=float, default=20.0, help="stimulation frequency (Hz)")
    ap.add_argument("--no-dac", action="store_true", help="a smooth artifact, without a DAC staircase")
    args = ap.parse_args(argv)
    res = {}
    with tempfile.TemporaryDirectory() as tmp:
        tmp = Path(tmp)
        for k in (1, 4):
            src = make_file(tmp / f"x{k}", k * args.seconds, args.channels, seed=k, freq=args.freq, dac=not args.no_dac)
            res[k] = dict(copy=_run("copy", src, tmp / f"copy{k}.dat"),
                          clean=_run("clean", src, tmp / f"clean{k}.dat", args.workers))
    print(f"{args.channels} channels, int16 Open Ephys binary, {args.seconds:g} s and {4 * args.seconds:g} s, "
          f"{args.freq:g} Hz {'without' if args.no_dac else 'with'} a DAC, template, {args.workers} worker(s)")
    print(f"{'file':<6} {'clean / copy throughput':>24} {'copy peak MiB':>14} {'clean peak MiB':>15}")
    for k, r in res.items():
        print(f"{k}x{'':<4} {r['copy']['seconds'] / r['clean']['seconds']:>24.3f} "
              f"{r['copy']['peak_kib'] / 1024:>14.0f} {r['clean']['peak_kib'] / 1024:>15.0f}")
    print(f"peak memory of clean, 4x / 1x: {res[4]['clean']['peak_kib'] / res[1]['clean']['peak_kib']:.3f}")
    return res


if __name__ == "__main__":
    if len(sys.argv) > 1 and sys.argv[1] == "--child":
        _child(sys.argv[2], sys.argv[3], sys.argv[4], int(sys.argv[5]))
    else:
        main()
