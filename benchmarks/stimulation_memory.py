"""Memory of the stimulation fit against the recording's length, as ratios from one run.

The stimulation fit (block finding, frequency and phase per block) works on
the reference channel decimated to 16 times the top frequency: 3.2 kHz
without a nominal frequency, 326 Hz with a 20 Hz one. This script builds such
a decimated reference directly (100 s blocks at 20 Hz every 4 minutes, 1 s
ramps, 2% heartbeat modulation, white noise) of ``--minutes`` and of 4 times
that, at the rate used without a nominal frequency (the larger one), and runs
``fit_decimated`` with and without a nominal frequency. It prints the fit's
peak traced memory (``tracemalloc``: what the fit allocates, besides the
reference it is handed) as a ratio to the reference's size, and the 4x / 1x
ratios of peak memory and time.

    python benchmarks/stimulation_memory.py [--minutes 15]
"""

from __future__ import annotations

import argparse
import time
import tracemalloc
import warnings

import numpy as np


def reference(minutes: float, fs_ds: float, seed: int = 3) -> np.ndarray:
    """A decimated reference channel with 20 Hz blocks (see the module docstring)."""
    n = int(fs_ds * 60 * minutes)
    t = np.arange(n) / fs_ds
    x = 50 * np.random.default_rng(seed).standard_normal(n)
    for s in np.arange(20.0, max(t[-1] - 150, 21.0), 240.0):
        level = np.clip((t - s) / 1.0, 0, 1) * np.clip((s + 100 - t) / 1.0, 0, 1)
        x += 2000 * level * (1 + 0.02 * np.sin(2 * np.pi * 1.3 * t)) * np.cos(2 * np.pi * 20.0008 * t)
    return x


def main(argv=None) -> dict:
    from artifactclean.stimulation import decimated_rate, fit_decimated

    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--minutes", type=float, default=15.0, help="length of the 1x reference (minutes)")
    args = ap.parse_args(argv)
    warnings.simplefilter("ignore")
    fs, fs_ds = 30000.0, decimated_rate(None)
    res = {}
    for label, hint in (("20 Hz given", 20.0), ("none given", None)):
        rows = []
        for minutes in (args.minutes, 4 * args.minutes):
            x = reference(minutes, fs_ds)
            tracemalloc.start()
            t0 = time.perf_counter()
            model = fit_decimated(x, fs_ds, fs, int(x.size * fs / fs_ds), stim_freq=hint)
            dt = time.perf_counter() - t0
            peak = tracemalloc.get_traced_memory()[1]
            tracemalloc.stop()
            rows.append(dict(minutes=minutes, mib=x.nbytes / 2**20, peak_mib=peak / 2**20, seconds=dt,
                             blocks=sum(b.kind == "active" for b in model.blocks)))
            del x
        res[label] = rows
    print(f"stimulation fit of a reference decimated to {fs_ds:g} Hz (float64); peak traced memory besides it")
    print(f"{'frequency':<12} {'minutes':>7} {'blocks':>6} {'reference MiB':>13} {'fit peak MiB':>12} "
          f"{'peak / reference':>16}")
    for label, rows in res.items():
        for r in rows:
            print(f"{label:<12} {r['minutes']:>7g} {r['blocks']:>6} {r['mib']:>13.1f} {r['peak_mib']:>12.1f} "
                  f"{r['peak_mib'] / r['mib']:>16.2f}")
    for label, (one, four) in res.items():
        print(f"{label}: 4x / 1x peak memory {four['peak_mib'] / one['peak_mib']:.2f}, "
              f"time {four['seconds'] / one['seconds']:.2f}")
    return res


if __name__ == "__main__":
    main()
