"""One trace at 30 kHz and decimated to the rates of scalp and LFP systems: the LFP figures at each.

A synthetic trace (the estimator issue's: 4 mV with harmonics, 2% heartbeat
and 1% respiration modulation, 40 ppm drift, 1 s ramps, channel gains 1,
-0.7, 0.45, -1.2; no units, as there is no spike band at these rates) is
cleaned at 30 kHz, then decimated (``scipy.signal.resample_poly``, data and
neural truth alike) and cleaned again at each lower rate. Printed per
method and rate, worst channel: the residual within +-3 Hz of the harmonics
below 80 Hz (x the neural power there) and the LFP error away from those
bands, and the factor the cycle estimators upsampled the block by
(``resampling.py``; 1 = not upsampled). The same draw at every rate, so
differences come from the rate, not from the draw. Figures, not seconds.

    python benchmarks/low_rates.py [--freqs 5 10 20 40] [--rates 2000 1000 500] [--methods template regression pca]
                                   [--seconds 20] [--seed 1]
"""

from __future__ import annotations

import argparse
import dataclasses
import warnings


def main(argv=None) -> list[dict]:
    import numpy as np
    from scipy import signal

    from artifactclean import make_estimator
    from artifactclean.evaluation import _lfp_figures
    from artifactclean.scenarios import SCENARIOS
    from artifactclean.synthetic import NeuralSpec, simulate_recording

    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--freqs", type=float, nargs="+", default=[5, 10, 20, 40])
    ap.add_argument("--rates", type=int, nargs="+", default=[2000, 1000, 500],
                    help="rates (Hz) that divide 30000: the trace is decimated to each")
    ap.add_argument("--methods", nargs="+", default=["template", "regression", "pca"])
    ap.add_argument("--seconds", type=float, default=20.0)
    ap.add_argument("--seed", type=int, default=1)
    args = ap.parse_args(argv)
    fs0 = 30000
    bad = [r for r in args.rates if r <= 0 or fs0 % r]
    if bad:
        ap.error(f"--rates must divide {fs0} Hz, got {bad}")
    warnings.simplefilter("ignore")
    print(f"{args.seconds:g} s traces, seed {args.seed}, 4 channels; worst channel")
    print(f"{'method':<11} {'Hz':>3} {'rate Hz':>8} {'upsampled':>9} {'+-3 Hz':>7} {'away':>6}")
    rows = []
    for f in args.freqs:
        art = dataclasses.replace(SCENARIOS["modulated_20hz"][0], freq_hz=f)
        rec = simulate_recording(args.seconds, fs=float(fs0), artifact=art, neural=NeuralSpec(units=[]), seed=args.seed)
        stim = ~np.isnan(rec.stim_phase)
        for method in args.methods:
            for rate in [fs0] + sorted(args.rates, reverse=True):
                q = fs0 // rate
                x, neural, on = (rec.data, rec.neural, stim) if q == 1 else \
                    (signal.resample_poly(rec.data, 1, q, axis=1), signal.resample_poly(rec.neural, 1, q, axis=1),
                     stim[::q])
                est = make_estimator(method)
                out = est.fit_transform(x, fs=float(rate))
                figs = [_lfp_figures((out[c] - neural[c])[on], neural[c][on], float(rate), f)
                        for c in range(x.shape[0])]
                up = max([b.get("upsampled_by", 1) for b in est.report_.get("blocks", [])], default=1)
                row = dict(method=method, freq_hz=f, rate_hz=rate, upsampled_by=up,
                           band=max(b for b, _ in figs), away=max(a for _, a in figs))
                rows.append(row)
                print(f"{method:<11} {f:>3g} {rate:>8d} {up:>9d} {row['band']:>7.2f} {row['away']:>6.3f}", flush=True)
    return rows


if __name__ == "__main__":
    main()
