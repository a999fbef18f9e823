"""Job 1, from Python: clean a contaminated array and see what the cleaning chose.

Runs as it is on built-in synthetic data; replace ``rec.data`` and ``rec.fs``
with your own (n_channels, n_samples) array and sampling rate.
"""

import numpy as np

import artifactclean as ac
from artifactclean.synthetic import ArtifactSpec, simulate_recording

rec = simulate_recording(10.0, artifact=ArtifactSpec(freq_hz=10.0, dac_rate_hz=1000.0), seed=3)

# the one-call door
cleaned = ac.clean(rec.data, rec.fs, stim_freq=10.0)

# the object API says what it found and where samples were lost
est = ac.TemplateSubtraction().fit(rec.data, fs=rec.fs, stim_freq=10.0)
for blk in est.stim_model_.blocks:
    print(f"{blk.kind} block {blk.start / rec.fs:.2f}-{blk.stop / rec.fs:.2f} s at {blk.freq_hz:.5f} Hz "
          f"(drift {blk.drift_ppm:+.1f} ppm)")
print("DAC ticks per cycle found:", est.report_["blocks"][0]["dac_ticks_per_cycle"])
print("lost (clipped) samples:", int(est.lost_.sum()))
resid = cleaned - rec.neural
print(f"residual RMS after cleaning: {resid.std():.2f} uV (artifact RMS was {rec.artifact.std():.0f} uV)")
assert np.allclose(cleaned, est.transform(rec.data))
