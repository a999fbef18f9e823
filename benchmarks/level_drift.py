"""An electrode's level under the artifact: a DC offset and its drift, per method.

A DC-coupled amplifier holds tens of millivolts of electrode offset, and the
offset drifts. One synthetic trace per frequency (the estimator issue's: 4 mV
with harmonics, 2% heartbeat and 1% respiration modulation, 40 ppm drift, 1 s
ramps, channel gains 1, -0.7, 0.45, -1.2, the locked unit and three others)
is cleaned as drawn, with a per-channel offset (10-40 mV), with a drifting
level (a sine of ``--drift-uv`` at ``--drift-hz``, a random phase per
channel) and with both; the offset and drift are subtracted from the output
before scoring, so every row measures what they did to the cleaning.
Printed per method and case, worst channel: spike-band residual (x noise),
residual within +-3 Hz of the harmonics (x neural), LFP error away from
those bands and spike recall. Figures, not seconds.

    python benchmarks/level_drift.py [--freqs 5 40] [--methods template regression pca] [--seconds 20]
                                     [--drift-uv 2000] [--drift-hz 0.02] [--seed 1]
"""

from __future__ import annotations

import argparse
import dataclasses
import warnings


def main(argv=None) -> list[dict]:
    import numpy as np

    from artifactclean import clean
    from artifactclean.evaluation import score_cleaning
    from artifactclean.scenarios import SCENARIOS, locked_units
    from artifactclean.synthetic import NeuralSpec, simulate_recording

    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--freqs", type=float, nargs="+", default=[5, 40])
    ap.add_argument("--methods", nargs="+", default=["template", "regression", "pca"])
    ap.add_argument("--seconds", type=float, default=20.0)
    ap.add_argument("--drift-uv", type=float, default=2000.0, help="the drift's amplitude (uV)")
    ap.add_argument("--drift-hz", type=float, default=0.02, help="the drift's frequency (Hz)")
    ap.add_argument("--seed", type=int, default=1)
    args = ap.parse_args(argv)
    if not args.drift_hz > 0:
        ap.error(f"--drift-hz must be positive, got {args.drift_hz}")
    warnings.simplefilter("ignore")
    rng = np.random.default_rng(args.seed + 1000)
    offset = np.array([20000.0, -10000.0, 6000.0, 40000.0])[:, None]
    print(f"{args.seconds:g} s traces, seed {args.seed}; offsets 20, -10, 6, 40 mV; drift {args.drift_uv:g} uV at "
          f"{args.drift_hz:g} Hz; worst channel")
    print(f"{'method':<11} {'Hz':>3} {'level':<14} {'spike-band':>10} {'+-3 Hz':>7} {'away':>6} {'recall':>7}")
    rows = []
    for f in args.freqs:
        art = dataclasses.replace(SCENARIOS["modulated_20hz"][0], freq_hz=f)
        rec = simulate_recording(args.seconds, artifact=art, neural=NeuralSpec(units=locked_units()), seed=args.seed)
        t = np.arange(rec.data.shape[1]) / rec.fs
        drift = args.drift_uv * np.sin(2 * np.pi * args.drift_hz * t + rng.uniform(0, 2 * np.pi, (rec.data.shape[0], 1)))
        for method in args.methods:
            for case, added in (("as drawn", 0.0), ("offset", offset), ("drift", drift), ("offset+drift", offset + drift)):
                s = score_cleaning(rec, clean(rec.data + added, rec.fs, method=method) - added)
                row = dict(method=method, freq_hz=f, case=case, spikeband=max(s["spikeband_residual"]),
                           band=max(s["lfp_band_ratio"]), away=max(s["lfp_error_away"]), recall=s["recall_ratio"])
                rows.append(row)
                print(f"{method:<11} {f:>3g} {case:<14} {row['spikeband']:>10.3f} {row['band']:>7.2f} {row['away']:>6.3f} "
                      f"{row['recall']:>7.3f}", flush=True)
    return rows


if __name__ == "__main__":
    main()
