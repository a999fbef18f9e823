"""``artifactclean demo``: clean a built-in synthetic session with every method and score it."""

from __future__ import annotations

import json
import time
from pathlib import Path

import numpy as np

from .estimators import METHODS, make_estimator
from .evaluation import score_cleaning
from .jsonsafe import plain
from .synthetic import ArtifactSpec, BlockSpec, NeuralSpec, UnitSpec, simulate_recording

__all__ = ["demo_recording", "run_demo"]


def demo_recording(seed: int = 7, duration_s: float = 30.0):
    """A realistic 4-channel, 30 kHz session: 20 Hz block, sham block, 20 Hz block at lower amplitude.

    The artifact has harmonics, 2% heartbeat and 1% respiration modulation,
    40 ppm clock drift and a 1 kHz DAC staircase; four units, one locked to
    the stimulation phase (von Mises kappa = 1).
    """
    units = [
        UnitSpec(channel=0, rate_hz=12.0, amplitude_uv=110.0, shape="narrow", kappa=1.0, preferred_phase=1.0),
        UnitSpec(channel=1, rate_hz=8.0, amplitude_uv=90.0, shape="broad"),
        UnitSpec(channel=2, rate_hz=15.0, amplitude_uv=130.0, shape="narrow"),
        UnitSpec(channel=3, rate_hz=6.0, amplitude_uv=80.0, shape="broad"),
    ]
    blocks = [
        BlockSpec(start_s=1.0, duration_s=12.0, ramp_s=1.0),
        BlockSpec(start_s=15.0, duration_s=0.0, kind="sham", ramp_s=1.5),
        BlockSpec(start_s=19.5, duration_s=9.5, ramp_s=1.0, amplitude_scale=0.6, phase0=1.3),
    ]
    return simulate_recording(
        duration_s,
        artifact=ArtifactSpec(freq_hz=20.0, amplitude_uv=4000.0, dac_rate_hz=1000.0,
                              channel_gains=[1.0, -0.8, 0.6, -0.45]),
        neural=NeuralSpec(units=units),
        blocks=blocks,
        seed=seed,
    )


def run_demo(out: Path, *, seed: int = 7, duration_s: float = 30.0, methods=None, echo=print) -> dict:
    """Build the demo session, clean it with each method, print a table and write figures.

    Returns
    -------
    dict
        ``{method: scores}`` as also written to ``out/demo_scores.json``.
    """
    from .plotting import plot_spectra, plot_traces

    out = Path(out)
    out.mkdir(parents=True, exist_ok=True)
    echo(f"building a {duration_s:.0f} s synthetic session (4 channels, 30 kHz, 20 Hz, sham block, DAC staircase)...")
    rec = demo_recording(seed, duration_s)
    methods = list(methods or METHODS)
    cleaned, scores = {}, {}
    for name in methods:
        est = make_estimator(name)
        t0 = time.perf_counter()
        y = est.fit_transform(rec.data, fs=rec.fs, stim_freq=20.0)
        dt = time.perf_counter() - t0
        cleaned[name] = y
        s = score_cleaning(rec, y, lost=est.lost_)
        s["seconds"] = dt
        s["report"] = est.report_
        scores[name] = s
        echo(f"  cleaned with {name!r} in {dt:.1f} s")
    model = make_estimator(methods[0]).fit(rec.data, fs=rec.fs, stim_freq=20.0).stim_model_
    echo("")
    echo("stimulation found:")
    for row in model.block_table():
        if row["kind"] == "off":
            echo(f"  off     {row['start_s']:7.2f} - {row['stop_s']:7.2f} s")
        else:
            echo(f"  {row['kind']:<7} {row['start_s']:7.2f} - {row['stop_s']:7.2f} s  "
                 f"{row['freq_hz']:.5f} Hz  drift {row['drift_ppm']:+.1f} ppm  amplitude {row['amplitude']:.0f} uV")
    echo("")
    header = (f"{'method':<11}{'spike-band':>12}{'+-3 Hz band':>13}{'LFP error':>10}{'recall':>8}"
              f"{'worst/best':>11}{'delta PPC':>11}{'locked unit':>13}")
    sub = (f"{'':<11}{'resid/noise':>12}{'resid/neural':>13}{'away':>10}{'ratio':>8}"
           f"{'sixth':>11}{'':>11}{'PLV err, deg':>13}")
    echo(header)
    echo(sub)
    echo("-" * len(header))
    for name, s in scores.items():
        lu = s["locked_units"][0] if s["locked_units"] else dict(plv_error=np.nan, preferred_phase_error_deg=np.nan)
        echo(f"{name:<11}{np.nanmax(s['spikeband_residual']):>12.3f}{np.nanmax(s['lfp_band_ratio']):>13.2f}"
             f"{np.nanmax(s['lfp_error_away']):>10.3f}{s['recall_ratio']:>8.3f}{s['sixth_recall_min_over_max']:>11.3f}"
             f"{s['delta_ppc']:>+11.1e}{lu['plv_error']:>+8.3f},{lu['preferred_phase_error_deg']:>+4.1f}")
    echo("(worst channel shown; within stimulation blocks, against the artifact-free truth; LFP 1-80 Hz)")
    plot_traces(out / "traces.png", rec.fs, rec.data, cleaned, rec.neural, start_s=5.0, span_s=0.2)
    plot_spectra(out / "spectra.png", rec.fs, rec.data, cleaned, rec.neural)
    with open(out / "demo_scores.json", "w") as fh:
        json.dump(plain(scores), fh, indent=2)
    echo(f"\nfigures and scores written to {out}/ (traces.png, spectra.png, demo_scores.json)")
    # the validation suite on the same session: known spikes injected, every method ranked
    from .bench import run_bench, synthetic_case, write_report

    echo("\nvalidation: known spikes injected into the session, every method cleaned and ranked...")
    case = synthetic_case(rec, "demo session")
    rows = run_bench([case], methods=methods, grid={m: [{}] for m in methods}, seeds=(0,))
    summary = write_report(out, rows, [case], title="artifactclean demo: validation on the demo session", force=True,
                           command="artifactclean demo")
    for g in summary["ranking"]:
        echo(f"  {g['rank']}. {g['method']:<11} recall {g['recall']:.4f}  "
             f"{'phase-biased' if g['phase_biased'] else 'no phase bias'}")
    echo(f"report: {out}/report.html")
    return scores
