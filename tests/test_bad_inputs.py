"""The catalogue of bad inputs (README, "When the input is not what it should be"): each case gets
a clear message or a documented, warned handling; never a silent wrong result."""

import json
import signal
import subprocess
import sys
import time
import warnings

import numpy as np
import pytest

import artifactclean as ac
from artifactclean.demo_files import write_openephys_binary
from artifactclean.synthetic import ArtifactSpec, BlockSpec, NeuralSpec, simulate_recording

from test_io import cli


def test_flat_channel_is_left_alone_with_a_warning():
    rec = simulate_recording(6.0, n_channels=3, seed=51)
    x = rec.data.copy()
    x[1] = 12.5  # dead channel at a constant offset
    with pytest.warns(UserWarning, match=r"channel\(s\) \[1\] are flat"):
        est = ac.TemplateSubtraction()
        y = est.fit_transform(x, fs=rec.fs, stim_freq=20.0)
    assert np.all(y[1] == 12.5) and not est.lost_[1].any()


def test_no_stimulation_returns_input_with_a_warning():
    rec = simulate_recording(6.0, artifact=ArtifactSpec(amplitude_uv=0.0), seed=52)
    with pytest.warns(UserWarning, match="no stimulation found near 20.0 Hz"):
        y = ac.clean(rec.data, rec.fs, stim_freq=20.0)
    np.testing.assert_array_equal(y, rec.data)


def test_wrong_frequency_hint_is_reported_not_guessed():
    rec = simulate_recording(6.0, artifact=ArtifactSpec(freq_hz=10.0), seed=53)
    with pytest.warns(UserWarning, match="survey"):
        with pytest.warns(UserWarning, match="no stimulation blocks near 20 Hz, but blocks at 10 Hz"):
            y = ac.clean(rec.data, rec.fs, stim_freq=20.0)
    np.testing.assert_array_equal(y, rec.data)  # nothing subtracted at the wrong frequency


def test_units_that_are_not_a_voltage(tmp_path):
    rec = simulate_recording(3.0, n_channels=2, seed=54)
    root = write_openephys_binary(tmp_path / "s", rec.data, rec.fs)
    oebin = next(root.rglob("structure.oebin"))
    meta = json.loads(oebin.read_text())
    meta["continuous"][0]["channels"][0]["units"] = "A"
    oebin.write_text(json.dumps(meta))
    r = cli("survey", root, check=False)
    assert r.returncode == 2 and "not a voltage" in r.stderr


def test_truncated_file_is_an_error_not_a_short_read(tmp_path):
    rec = simulate_recording(3.0, n_channels=4, seed=55)
    root = write_openephys_binary(tmp_path / "s", rec.data, rec.fs)
    dat = next(root.rglob("continuous.dat"))
    with open(dat, "r+b") as fh:
        fh.truncate(dat.stat().st_size // 2 + 3)  # cut mid-sample
    r = cli("clean", root, "-o", tmp_path / "out.dat", check=False)
    assert r.returncode == 2 and "error" in r.stderr and "Traceback" not in r.stderr
    assert not (tmp_path / "out.dat").exists()


def test_int16_overflow_is_counted_and_warned(tmp_path):
    rec = simulate_recording(4.0, n_channels=2, seed=56)
    root = write_openephys_binary(tmp_path / "s", rec.data, rec.fs)
    r = cli("clean", root, "-o", tmp_path / "o.dat", "--stim-freq", "20", "--gain-uv", "0.001")
    side = json.loads((tmp_path / "o.json").read_text())
    assert side["saturated_samples"] > 0 and "clamped" in r.stderr
    y = np.fromfile(tmp_path / "o.dat", dtype="<i2")
    assert y.max() <= 32767 and y.min() >= -32768  # clamped, never wrapped


def test_interrupted_run_leaves_no_output(tmp_path):
    rec = simulate_recording(60.0, n_channels=4, neural=NeuralSpec(units=[]),
                             blocks=[BlockSpec(1.0, 58.0)], seed=57)
    root = write_openephys_binary(tmp_path / "s", rec.data, rec.fs)
    out = tmp_path / "o.dat"
    # SIGINT as a terminal gives it: a shell starting the tests in the background ignores SIGINT, a child
    # inherits that, and Python then installs no handler (the run went on to the end and the test skipped)
    p = subprocess.Popen([sys.executable, "-m", "artifactclean.cli", "clean", str(root), "-o", str(out),
                          "--stim-freq", "20"], stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
                         preexec_fn=lambda: signal.signal(signal.SIGINT, signal.SIG_DFL))
    # interrupt while the output is being written: its temporary file exists then
    deadline = time.monotonic() + 120
    while not list(tmp_path.glob(".o.dat.partial-*")) and p.poll() is None and time.monotonic() < deadline:
        time.sleep(0.05)
    p.send_signal(signal.SIGINT)
    _, err = p.communicate(timeout=120)
    if p.returncode == 0:  # finished before the signal: nothing to check on this machine
        pytest.skip("the run finished before it could be interrupted")
    assert p.returncode == 130 and "interrupted" in err
    assert not out.exists() and not out.with_suffix(".json").exists()
    assert not list(tmp_path.glob(".*partial*"))


def test_monitor_at_another_rate_or_length():
    from artifactclean.io import ArrayRecording, clean_recording

    rec = simulate_recording(4.0, n_channels=2, seed=58)
    data = ArrayRecording(rec.data, rec.fs)
    monitor = ArrayRecording(rec.artifact[:1, : rec.n_samples // 2], rec.fs)
    with pytest.raises(ValueError, match="monitor channel has"):
        clean_recording(data, "unused.dat", monitor=(monitor, 0))


def test_unlocked_dac_staircase_is_reported_not_hidden():
    # 13.37 Hz from a 1 kHz DAC: 74.8 updates per cycle, and the ticks repeat only every 1337 cycles;
    # the template reads each tick's held phase, the row estimators do not model it and say so
    rec = simulate_recording(8.0, artifact=ArtifactSpec(freq_hz=13.37, dac_rate_hz=1000.0), seed=59)
    with pytest.warns(UserWarning, match="not locked to the 13.37"):
        est = ac.HarmonicRegression().fit(rec.data, fs=rec.fs, stim_freq=13.37)
    assert est.report_["blocks"][0]["unlocked_dac_steps_per_s"] > 300  # ~1000 updates/s, steep ones seen
    locked = simulate_recording(8.0, artifact=ArtifactSpec(freq_hz=10.0, dac_rate_hz=1000.0), seed=59)
    import warnings

    with warnings.catch_warnings():
        warnings.simplefilter("error")
        est = ac.TemplateSubtraction().fit(locked.data, fs=locked.fs, stim_freq=10.0)
    assert est.report_["blocks"][0]["dac_ticks_per_cycle"] == 100


def test_stimulation_as_slow_as_the_heartbeat_is_warned():
    # 1-3 Hz: the heartbeat's sidebands land on the stimulation's harmonics (README input table); the run
    # says so, once per block, and a 5 Hz block does not
    rec = simulate_recording(12.0, n_channels=2, artifact=ArtifactSpec(freq_hz=2.0),
                             blocks=[BlockSpec(0.5, 11.0, ramp_s=1.0)], seed=58)
    with pytest.warns(UserWarning, match=r"stimulation at 2\.00 Hz: below 4 Hz a heartbeat"):
        ac.clean(rec.data, rec.fs, method="regression")
    rec = simulate_recording(6.0, n_channels=2, artifact=ArtifactSpec(freq_hz=5.0), seed=58)
    with warnings.catch_warnings():
        warnings.filterwarnings("error", message="stimulation at")
        ac.clean(rec.data, rec.fs)


def test_several_segments_are_named_not_dropped(tmp_path):
    """A recording that stopped and restarted holds several segments; cleaning one must say so."""
    import neo
    import quantities as pq
    from neo.io import NixIO

    blk = neo.Block()
    rng = np.random.default_rng(8)
    for k in range(3):
        seg = neo.Segment()
        seg.analogsignals.append(neo.AnalogSignal(rng.standard_normal((60000, 2)), units="uV",
                                                  sampling_rate=30000 * pq.Hz, t_start=5.0 * k * pq.s))
        blk.segments.append(seg)
    path = tmp_path / "gaps.nix"
    with NixIO(str(path), "ow") as io:
        io.write_block(blk)
    r = cli("clean", path, "-o", tmp_path / "seg0.dat", "--stim-freq", "20", check=False)
    assert r.returncode == 0 and "3 segments" in r.stderr and "--segment 1, 2" in r.stderr
    r = cli("clean", path, "-o", tmp_path / "seg2.dat", "--segment", "2", "--stim-freq", "20", check=False)
    assert r.returncode == 0 and "--segment 0, 1" in r.stderr
    side = json.loads((tmp_path / "seg2.json").read_text())
    assert side["n_samples"] == 60000
    r = cli("clean", path, "-o", tmp_path / "seg9.dat", "--segment", "9", check=False)
    assert r.returncode == 2 and "segment 9 does not exist" in r.stderr


@pytest.mark.parametrize("failure, reason", [
    (lambda: OSError(28, "No space left on device"), "No space left"),   # errno.ENOSPC
    (lambda: PermissionError(13, "Permission denied"), "Permission denied"),  # a read-only folder
])
@pytest.mark.parametrize("workers", [1, 2])
def test_failed_write_leaves_nothing_behind(failure, reason, workers, tmp_path, monkeypatch, capsys):
    """A full disk or a folder that turns read-only mid-run (not provokable as root, so the write
    itself is made to fail): one-line error, exit code 2, no output and no temporary file."""
    from artifactclean import cli
    from artifactclean.io import writers

    rec = simulate_recording(12.0, neural=NeuralSpec(units=[]), blocks=[BlockSpec(1.0, 10.0)], seed=58)
    root = write_openephys_binary(tmp_path / "s", rec.data, rec.fs)
    calls = {"n": 0}
    real_put = writers.DatWriter._put

    def failing_put(self, k, chunk):
        calls["n"] += 1
        if calls["n"] > 2:  # fail after some data went to disk
            raise failure()
        return real_put(self, k, chunk)

    monkeypatch.setattr(writers.DatWriter, "_put", failing_put)
    out = tmp_path / "o.dat"
    code = cli.main(["clean", str(root), "-o", str(out), "--stim-freq", "20", "--workers", str(workers),
                     "--chunk-seconds", "1"])
    err = capsys.readouterr().err
    assert code == 2 and reason in err and "Traceback" not in err
    assert not out.exists() and not out.with_suffix(".json").exists()
    assert not list(tmp_path.glob(".*partial*"))
