"""How much the template's figures depend on where its gain segments fall on the cycle.

The gain is fitted per part of a cycle, the parts cut from the stimulation
model's phase origin, which follows a convention (the reference channel's
sign). Rotating every block's ``phase_ref`` by a fraction of a cycle moves
only those parts (the template's bins and the DAC grids follow the phase).
For each trace (the acceptance traces: 4 mV, harmonics, 2% heartbeat, 1%
respiration, 40 ppm drift, a locked unit) this prints the worst channel's LFP
error away from the +-3 Hz bands, and the spike-band residual, at each
offset. Channel gains of mixed signs (the acceptance traces) or of one sign.

    python benchmarks/segment_offset.py [--freqs 10] [--seeds 1] [--heart pulse] [--seconds 20]
                                        [--offsets 0 0.0833 0.1667 0.25 0.3333 0.4167 0.5]
"""

from __future__ import annotations

import argparse
import copy
import dataclasses
import warnings

import numpy as np

GAINS = {"mixed": (1.0, -0.7, 0.45, -1.2), "one-sign": (1.0, 0.7, 0.45, 1.2)}


def main(argv=None) -> list[dict]:
    from artifactclean.estimators import TemplateSubtraction
    from artifactclean.estimators.base import _fit_model
    from artifactclean.evaluation import score_cleaning
    from artifactclean.scenarios import SCENARIOS, locked_units
    from artifactclean.synthetic import NeuralSpec, simulate_recording

    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--freqs", type=float, nargs="+", default=[10.0])
    ap.add_argument("--seeds", type=int, nargs="+", default=[1])
    ap.add_argument("--heart", choices=("pulse", "sine"), default="pulse")
    ap.add_argument("--seconds", type=float, default=20.0)
    ap.add_argument("--offsets", type=float, nargs="+", default=[0, 1 / 12, 1 / 6, 1 / 4, 1 / 3, 5 / 12, 1 / 2],
                    help="fractions of a cycle")
    args = ap.parse_args(argv)
    warnings.simplefilter("ignore")
    print(f"'template', {args.seconds:g} s traces, {args.heart} heartbeat; worst channel, LFP away / spike band "
          "by offset (cycles): " + " ".join(f"{d:.3f}" for d in args.offsets))
    rows = []
    for f in args.freqs:
        for seed in args.seeds:
            for name, gains in GAINS.items():
                art = dataclasses.replace(SCENARIOS["modulated_20hz"][0], freq_hz=f, channel_gains=gains)
                if args.heart == "sine":
                    art = dataclasses.replace(art, heart_harmonics=())
                rec = simulate_recording(args.seconds, artifact=art, neural=NeuralSpec(units=locked_units()),
                                         seed=seed)
                model = _fit_model(rec.data, rec.fs, None, None)
                figures = []
                for d in args.offsets:
                    turned = copy.deepcopy(model)
                    for blk in turned.blocks:
                        blk.phase_ref = blk.phase_ref + 2 * np.pi * d
                    s = score_cleaning(rec, TemplateSubtraction().fit_transform(rec.data, fs=rec.fs, stim_model=turned))
                    figures.append((max(s["lfp_error_away"]), max(s["spikeband_residual"])))
                rows.append(dict(freq_hz=f, seed=seed, gains=name, figures=figures))
                print(f"{f:5g} Hz seed {seed} {name:<8} " + " ".join(f"{a:.3f}/{b:.3f}" for a, b in figures),
                      flush=True)
    return rows


if __name__ == "__main__":
    main()
