"""Job 1 with files: survey an Open Ephys recording, clean it to a sorter-ready .dat, read it back.

Writes a small synthetic Open Ephys binary recording into a temporary folder
first; point ``open_recording`` at your own recording instead. The same
steps on the command line:

    artifactclean survey SESSION --stim-freq 20 --save-profile rig.toml
    artifactclean clean SESSION -o cleaned.dat --profile rig.toml
"""

import json
import tempfile
from pathlib import Path

import numpy as np

from artifactclean.demo_files import write_openephys_binary
from artifactclean.io import clean_recording, open_recording, survey_recording
from artifactclean.synthetic import ArtifactSpec, simulate_recording

# a temporary folder, removed at the end (the run prints what it found and wrote)
with tempfile.TemporaryDirectory(prefix="artifactclean-example-") as tmp:
    work = Path(tmp)
    rec = simulate_recording(12.0, artifact=ArtifactSpec(freq_hz=20.0, drift_ppm=25.0), seed=9)
    session = write_openephys_binary(work / "session", rec.data, rec.fs)

    recording = open_recording(session)  # format guessed; lazy: only the header is read here
    survey = survey_recording(recording, stim_freq=20.0)
    print(f"{recording.format}: {recording.n_channels} channels at {recording.fs:g} Hz")
    for blk in survey["stimulation"]["blocks"]:
        if blk["kind"] != "off":
            print(f"{blk['kind']} block {blk['start_s']:.2f}-{blk['stop_s']:.2f} s, {blk['freq_hz']:.5f} Hz, "
                  f"drift {blk['drift_ppm']:+.1f} ppm")

    out = clean_recording(recording, work / "cleaned.dat", stim_freq=20.0)
    side = json.loads((work / "cleaned.json").read_text())
    cleaned = np.fromfile(work / "cleaned.dat", dtype="<i2").reshape(-1, side["n_channels"]).T * side["gain_uv_per_bit"]
    print("wrote", ", ".join(Path(p).name for p in out["written"]), f"({side['gain_uv_per_bit']} uV per bit)")
    resid = cleaned - rec.neural
    print(f"residual RMS {resid.std():.1f} uV against an artifact of {rec.artifact.std():.0f} uV RMS")
