"""The estimator issue's acceptance figures on synthetic truth, one row per trace.

For each stimulation frequency (5, 10, 20, 40 Hz by default; any other
takes the same artifact at that frequency), with and without a DAC
staircase (1 kHz unless ``--dac-rate``), and for a pulsatile and a sinusoidal
heartbeat (2 Hz unless ``--heart-hz``; a person at rest has about 1-1.2 Hz, a
macaque 2-3 Hz): a 4 mV artifact with harmonics, 2% heartbeat and 1% respiration
modulation, 40 ppm drift, 1 s ramps, 4 channels of different gains and
signs and a unit locked to the stimulation (von Mises kappa = 1). Prints
the worst channel's spike-band residual (x noise), residual within +-3 Hz
of the harmonics (x neural), LFP error away from those bands, recall
ratio, worst/best sixth, delta PPC and the locked unit's PLV and phase
errors. ``--param NAME=VALUE`` (repeatable; VALUE a Python literal) passes
an estimator parameter to ``clean``. ``--pulse-tau S`` makes the pulsatile
heartbeat a train of alpha-function pulses rising within ``S`` seconds, ten
harmonics falling as ``1 / k^2`` (the default pulse has two, at 0.5 and
0.25 of the fundamental; :func:`artifactclean.synthetic.alpha_pulse_harmonics`).
``--lowpass HZ`` records the traces through an amplifier's anti-aliasing
low-pass at HZ (``ArtifactSpec.lowpass_hz``; 7500 is common at 30 kHz).
``--heart-jitter F`` makes each heartbeat's length differ by F (SD) from
beat to beat (``ArtifactSpec.heart_jitter``; 0.04 is a person at rest).
Figures, not seconds: nothing here is timed.

    python benchmarks/acceptance.py [--method template] [--seconds 20] [--seeds 1 3] [--freqs 5 10 20 40]
                                    [--dac-rate 1000] [--heart-hz 2] [--pulse-tau 0.07] [--lowpass 7500]
                                    [--heart-jitter 0.04] [--param tracking_hz=20 ...]
"""

from __future__ import annotations

import argparse
import ast
import dataclasses
import warnings


def _param(text: str) -> tuple[str, object]:
    name, sep, value = text.partition("=")
    if not sep or not name.strip():
        raise argparse.ArgumentTypeError(f"expected NAME=VALUE, got {text!r}")
    try:
        return name.strip(), ast.literal_eval(value.strip())
    except (ValueError, SyntaxError):
        return name.strip(), value.strip()  # a bare word: a string (method names, "auto", "off")


def main(argv=None) -> list[dict]:
    from artifactclean import DEFAULT_METHOD, clean, make_estimator
    from artifactclean.evaluation import score_cleaning
    from artifactclean.scenarios import SCENARIOS, locked_units
    from artifactclean.synthetic import NeuralSpec, alpha_pulse_harmonics, simulate_recording

    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--method", default=DEFAULT_METHOD)
    ap.add_argument("--seconds", type=float, default=20.0)
    ap.add_argument("--seeds", type=int, nargs="+", default=[1])
    ap.add_argument("--freqs", type=float, nargs="+", default=[5, 10, 20, 40])
    ap.add_argument("--dac-rate", type=float, default=1000.0, help="updates per second of the DAC rows (Hz)")
    ap.add_argument("--heart-hz", type=float, default=SCENARIOS["modulated_20hz"][0].heart_rate_hz,
                    help="heart rate of the traces (Hz)")
    ap.add_argument("--pulse-tau", type=float, default=None, metavar="S",
                    help="the pulsatile heartbeat as alpha-function pulses rising within S seconds (e.g. 0.07)")
    ap.add_argument("--lowpass", type=float, default=None, metavar="HZ",
                    help="the amplifier's anti-aliasing low-pass (Hz, e.g. 7500)")
    ap.add_argument("--heart-jitter", type=float, default=0.0, metavar="F",
                    help="beat-to-beat change of each heartbeat's length, a fraction (SD, e.g. 0.04)")
    ap.add_argument("--param", type=_param, action="append", default=[], metavar="NAME=VALUE",
                    help="an estimator parameter for clean(), e.g. tracking_hz=20 or 'heart_band_hz=(4, 12)'")
    args = ap.parse_args(argv)
    warnings.simplefilter("ignore")
    if not args.dac_rate > 0:
        ap.error(f"--dac-rate must be positive, got {args.dac_rate:g}")
    if not args.heart_hz > 0:
        ap.error(f"--heart-hz must be positive, got {args.heart_hz:g}")
    if args.pulse_tau is not None and not args.pulse_tau > 0:
        ap.error(f"--pulse-tau must be positive, got {args.pulse_tau:g}")
    if not 0 <= args.heart_jitter < 0.25:
        ap.error(f"--heart-jitter must lie in [0, 0.25), got {args.heart_jitter:g}")
    if args.lowpass is not None and not 0 < args.lowpass < 15000:
        ap.error(f"--lowpass must lie between 0 and 15000 Hz (the traces' fs / 2), got {args.lowpass:g}")
    params = dict(args.param)
    try:
        make_estimator(args.method, **params)
    except (ValueError, TypeError) as exc:
        ap.error(str(exc))
    print(f"{args.method!r}, {args.seconds:g} s traces, seeds {args.seeds}, DAC rows at {args.dac_rate:g} Hz, "
          f"heart at {args.heart_hz:g} Hz"
          f"{'' if args.pulse_tau is None else f', alpha pulses of {args.pulse_tau:g} s'}"
          f"{'' if args.lowpass is None else f', amplifier low-pass at {args.lowpass:g} Hz'}"
          f"{f', beats {args.heart_jitter:g} apart' if args.heart_jitter else ''}"
          f"{''.join(f', {k}={v!r}' for k, v in params.items())}; worst channel")
    print(f"{'heartbeat':<10} {'Hz':>3} {'DAC':>4} {'seed':>4} {'spike-band':>10} {'+-3 Hz':>7} {'away':>6} "
          f"{'recall':>7} {'sixth':>6} {'dPPC':>9} {'PLV err':>8} {'phase':>6}")
    rows = []
    for heart in ("pulse", "sine"):
        for f in args.freqs:
            for dac in ("", "_dac"):
                # the built-in modulated scenarios, at any frequency (5, 10, 20 and 40 Hz are theirs)
                art = dataclasses.replace(SCENARIOS["modulated_20hz"][0], freq_hz=f, heart_rate_hz=args.heart_hz,
                                          dac_rate_hz=args.dac_rate if dac else None, lowpass_hz=args.lowpass,
                                          heart_jitter=args.heart_jitter)
                if heart == "sine":
                    art = dataclasses.replace(art, heart_harmonics=())
                elif args.pulse_tau is not None:
                    art = dataclasses.replace(art, heart_harmonics=alpha_pulse_harmonics(args.heart_hz,
                                                                                         args.pulse_tau))
                for seed in args.seeds:
                    rec = simulate_recording(args.seconds, artifact=art, neural=NeuralSpec(units=locked_units()),
                                             seed=seed)
                    s = score_cleaning(rec, clean(rec.data, rec.fs, method=args.method, **params))
                    lu = s["locked_units"][0] if s["locked_units"] else {}
                    row = dict(heart=heart, freq_hz=f, dac=bool(dac), seed=seed,
                               spikeband=max(s["spikeband_residual"]), band=max(s["lfp_band_ratio"]),
                               away=max(s["lfp_error_away"]), recall=s["recall_ratio"],
                               sixth=s["sixth_recall_min_over_max"], delta_ppc=s["delta_ppc"],
                               plv_error=lu.get("plv_error", float("nan")),
                               phase_error_deg=lu.get("preferred_phase_error_deg", float("nan")))
                    rows.append(row)
                    print(f"{heart:<10} {f:>3g} {'yes' if dac else 'no':>4} {seed:>4} {row['spikeband']:>10.3f} "
                          f"{row['band']:>7.2f} {row['away']:>6.3f} {row['recall']:>7.3f} {row['sixth']:>6.3f} "
                          f"{row['delta_ppc']:>+9.1e} {row['plv_error']:>+8.3f} {row['phase_error_deg']:>+6.1f}",
                          flush=True)
    return rows


if __name__ == "__main__":
    main()
