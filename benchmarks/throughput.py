"""Throughput of each estimator as ratios measured in one run.

Prints, for a 4-channel 30 kHz synthetic trace, each method's samples per
second divided by that of ``numpy.copyto`` on the same array and by that of
the notch comb. Ratios, not seconds: the machines are shared and noisy.

    python benchmarks/throughput.py [--seconds 20] [--freq 20] [--repeat 3] [--dac 1000] [--lowpass 7500]

``--dac`` adds a DAC staircase at that update rate, ``--lowpass`` the
amplifier's anti-aliasing low-pass (``ArtifactSpec.lowpass_hz``).
"""

from __future__ import annotations

import argparse
import time

import numpy as np

from artifactclean import METHODS, make_estimator
from artifactclean.synthetic import ArtifactSpec, simulate_recording


def best_time(fn, repeat: int) -> float:
    times = []
    for _ in range(repeat):
        t0 = time.perf_counter()
        fn()
        times.append(time.perf_counter() - t0)
    return min(times)


def main(argv=None) -> dict:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--seconds", type=float, default=20.0)
    ap.add_argument("--freq", type=float, default=20.0)
    ap.add_argument("--dac", type=float, default=None, help="DAC update rate (Hz); none by default")
    ap.add_argument("--lowpass", type=float, default=None, help="the amplifier's low-pass (Hz); none by default")
    ap.add_argument("--repeat", type=int, default=3)
    args = ap.parse_args(argv)
    rec = simulate_recording(args.seconds, artifact=ArtifactSpec(freq_hz=args.freq, dac_rate_hz=args.dac,
                                                                 lowpass_hz=args.lowpass), seed=0)
    x = rec.data
    out = np.empty_like(x)
    t_copy = best_time(lambda: np.copyto(out, x), max(args.repeat, 10))
    times = {}
    for name in METHODS:
        est = make_estimator(name)
        times[name] = best_time(lambda: est.fit_transform(x, fs=rec.fs, stim_freq=args.freq), args.repeat)
    print(f"{x.shape[0]} channels x {x.shape[1]} samples ({args.seconds:.0f} s at {rec.fs:.0f} Hz), "
          f"{args.freq:g} Hz artifact{'' if args.dac is None else f', {args.dac:g} Hz DAC'}"
          f"{'' if args.lowpass is None else f', {args.lowpass:g} Hz low-pass'}, best of {args.repeat}")
    print(f"{'method':<10} {'throughput / numpy.copyto':>26} {'throughput / comb':>18}")
    for name, t in times.items():
        print(f"{name:<10} {t_copy / t:>26.4f} {times['comb'] / t:>18.2f}")
    return dict(copyto=t_copy, **times)


if __name__ == "__main__":
    main()
