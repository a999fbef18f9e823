"""How far a file cleaned in pieces of time is from the whole array cleaned at once, per method.

Issue goal: chunked results equal the whole-array result within 1e-6 of the
data's range. A 4-channel 20 Hz trace with a 1 kHz DAC staircase, heartbeat
and respiration modulation, 40 ppm drift and clipping on the two strongest
channels is written as float32 NIX by ``clean_recording(max_range_s=...)``
(several pieces of time, 2 workers) and compared with ``clean`` of the array.
Prints, per method and channel, the largest difference as a fraction of the
data's range and where it is.

    python benchmarks/pieces.py [--seconds 50] [--max-range 9] [--freq 20] [--dac-rate 1000] [--method template ...]
"""

from __future__ import annotations

import argparse
import json
import tempfile
import warnings
from pathlib import Path

import numpy as np


def main(argv=None) -> dict:
    from neo.io import NixIO

    from artifactclean import METHODS, clean
    from artifactclean.io import open_recording
    from artifactclean.io.pipeline import clean_recording
    from artifactclean.synthetic import ArtifactSpec, BlockSpec, simulate_recording

    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--seconds", type=float, default=50.0)
    ap.add_argument("--max-range", type=float, default=9.0, help="max_range_s of the file run (s)")
    ap.add_argument("--method", nargs="+", default=list(METHODS))
    ap.add_argument("--seed", type=int, default=6)
    ap.add_argument("--freq", type=float, default=20.0, help="stimulation frequency (Hz)")
    ap.add_argument("--dac-rate", type=float, default=1000.0, help="DAC update rate (Hz; 0: no DAC)")
    args = ap.parse_args(argv)
    warnings.simplefilter("ignore")
    rec = simulate_recording(args.seconds, artifact=ArtifactSpec(freq_hz=args.freq, dac_rate_hz=args.dac_rate or None, heart_depth=0.02,
                                                                 resp_depth=0.01, drift_ppm=40.0, clip_uv=3600.0),
                             blocks=[BlockSpec(1.0, args.seconds - 2.0, ramp_s=1.0)], seed=args.seed)
    span = float(np.ptp(rec.data))
    clipped = rec.clipped.any(axis=1)
    res = {}
    with tempfile.TemporaryDirectory() as tmp:
        for method in args.method:
            out = Path(tmp) / f"{method}.nix"
            clean_recording(open_recording(rec.data, fs=rec.fs), out, method=method, max_range_s=args.max_range,
                            workers=2)
            whole = clean(rec.data, rec.fs, method=method)
            with NixIO(str(out), "ro") as io:
                blk = io.read_block()
            n_pieces = len({r["start_s"] for r in json.loads(blk.annotations["provenance"])["estimator_report"]})
            y = np.asarray(blk.segments[0].analogsignals[0].magnitude, dtype=float).T
            d = np.abs(y - whole) / span
            res[method] = dict(pieces=n_pieces, worst=d.max(axis=1), at_s=np.argmax(d, axis=1) / rec.fs)
    dac = f"{args.dac_rate / 1000:g} kHz DAC" if args.dac_rate else "no DAC"
    print(f"{rec.data.shape[0]} channels x {args.seconds:g} s, {args.freq:g} Hz + {dac}, clipped channels "
          f"{np.flatnonzero(clipped).tolist()}; file in pieces of <= {args.max_range:g} s against the whole array")
    print(f"{'method':<11} {'pieces':>6}  largest |difference| / range per channel (at s)   goal <= 1e-6")
    for method, r in res.items():
        cells = "  ".join(f"{w:.1e} ({t:4.1f})" for w, t in zip(r["worst"], r["at_s"]))
        print(f"{method:<11} {r['pieces']:>6}  {cells}")
    return res


if __name__ == "__main__":
    main()
