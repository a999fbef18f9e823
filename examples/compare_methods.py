"""Job 3 in miniature: score every cleaning method against synthetic truth.

Spike-band residual, residual at the harmonics, spike recall and phase bias
for each method on one synthetic trace (the ``artifactclean demo`` command
does the same on a richer session and writes figures).
"""

import artifactclean as ac
from artifactclean.evaluation import score_cleaning
from artifactclean.synthetic import ArtifactSpec, NeuralSpec, UnitSpec, simulate_recording

units = [UnitSpec(channel=0, rate_hz=15.0, amplitude_uv=100.0, kappa=1.0)]
rec = simulate_recording(12.0, n_channels=2, artifact=ArtifactSpec(freq_hz=20.0),
                         neural=NeuralSpec(units=units), seed=5)
print(f"{'method':<11} {'spike-band resid/noise':>22} {'+-3 Hz resid/neural':>20} {'LFP error away':>15} "
      f"{'recall ratio':>12} {'delta PPC':>10}")
for method in ac.METHODS:
    s = score_cleaning(rec, ac.clean(rec.data, rec.fs, stim_freq=20.0, method=method))
    print(f"{method:<11} {max(s['spikeband_residual']):>22.3f} {max(s['lfp_band_ratio']):>20.2f} "
          f"{max(s['lfp_error_away']):>15.3f} {s['recall_ratio']:>12.3f} {s['delta_ppc']:>+10.1e}")
