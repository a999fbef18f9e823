"""`artifactclean lockcheck` end to end on an Open Ephys recording with known locking."""

import csv
import hashlib
import json
import subprocess
import sys

import numpy as np
import pytest

from artifactclean.demo_files import write_openephys_binary
from artifactclean.phase_stats import ppc
from artifactclean.synthetic import ArtifactSpec, BlockSpec, NeuralSpec, UnitSpec, simulate_recording

PREFERRED = {1: 1.0, 2: 2.5}


@pytest.fixture(scope="module")
def session(tmp_path_factory):
    work = tmp_path_factory.mktemp("lockcheck")
    units = [UnitSpec(channel=0, rate_hz=25.0, amplitude_uv=110.0),
             UnitSpec(channel=1, rate_hz=25.0, amplitude_uv=110.0, kappa=0.5, preferred_phase=PREFERRED[1]),
             UnitSpec(channel=2, rate_hz=25.0, amplitude_uv=110.0, kappa=2.0, preferred_phase=PREFERRED[2])]
    blocks = [BlockSpec(start_s=1.0, duration_s=18.0, ramp_s=1.0),
              BlockSpec(start_s=21.0, duration_s=0.0, kind="sham", ramp_s=1.0),
              BlockSpec(start_s=25.0, duration_s=14.0, ramp_s=1.0)]
    rec = simulate_recording(40.0, artifact=ArtifactSpec(freq_hz=20.0), neural=NeuralSpec(units=units),
                             blocks=blocks, seed=4)
    path = write_openephys_binary(work / "session", rec.data, rec.fs)
    table = work / "spikes.csv"
    with open(table, "w", newline="") as fh:
        w = csv.writer(fh)
        w.writerow(["time_s", "unit"])
        for u, t in enumerate(rec.spike_times):
            for x in t:
                w.writerow([f"{x:.6f}", u])
    return rec, path, table, work


def _run(*args):
    return subprocess.run([sys.executable, "-m", "artifactclean.cli", "lockcheck", *map(str, args)],
                          capture_output=True, text=True, timeout=600)


def _digest(path):
    h = hashlib.sha256()
    for f in sorted(p for p in path.rglob("*") if p.is_file()):
        h.update(f.read_bytes())
    return h.hexdigest()


def test_lockcheck_recovers_known_locking(session):
    rec, path, table, work = session
    before = _digest(path), _digest(table.parent / "spikes.csv")
    out = work / "out"
    r = _run("--spikes", table, "--recording", path, "--stim-freq", 20, "--out", out, "--seed", 3)
    assert r.returncode == 0, r.stderr
    assert (_digest(path), _digest(table.parent / "spikes.csv")) == before  # inputs untouched
    for name in ("lockcheck.json", "lockcheck.csv", "phase_histograms.png", "ppc_stim_vs_sham.png", "efficiency.png"):
        assert (out / name).stat().st_size > 200
    res = json.loads((out / "lockcheck.json").read_text())
    rows = {(str(r["unit"]), r["condition"]): r for r in res["units"]}
    stim = {u: rows[(str(u), "stim 20 Hz")] for u in range(3)}
    for r in res["units"]:
        for key in ("unit", "condition", "n_spikes", "plv", "ppc", "preferred_phase_deg", "p_value", "p_value_residue"):
            assert key in r
        if r["preferred_phase_deg"] is not None:
            assert 0 <= r["preferred_phase_deg"] < 360
    # PPC against the truth: the true stimulation phase of the same spikes (inside the found blocks)
    spans = [(b["start_s"], b["stop_s"]) for b in res["stimulation"]["blocks"] if b["kind"] == "active"]
    for u, times in enumerate(rec.spike_times):
        inside = np.zeros(times.size, dtype=bool)
        for a, b in spans:
            inside |= (times >= a) & (times < b)
        true_ppc = ppc(rec.stim_phase[np.round(times[inside] * rec.fs).astype(int)])
        assert stim[u]["n_spikes"] == inside.sum()
        assert abs(stim[u]["ppc"] - true_ppc) <= 0.02, (u, stim[u]["ppc"], true_ppc)
    assert not any(r["locked"] for r in res["units"] if str(r["unit"]) == "0")
    assert stim[1]["locked"] and stim[2]["locked"]
    d_meas = np.radians(stim[2]["preferred_phase_deg"] - stim[1]["preferred_phase_deg"])
    d_true = PREFERRED[2] - PREFERRED[1]
    assert abs(np.degrees(np.angle(np.exp(1j * (d_meas - d_true))))) <= 10.0
    assert res["efficiency"]["injected"] > 1000 and res["seed"] == 3
    # the same run again gives the same numbers (seeded)
    r2 = _run("--spikes", table, "--recording", path, "--stim-freq", 20, "--out", out, "--seed", 3, "--force")
    assert r2.returncode == 0
    assert json.loads((out / "lockcheck.json").read_text())["units"] == res["units"]


@pytest.mark.parametrize("content,message", [
    ("time_s,unit\n", "holds no spikes"),
    ("t,cluster\n1.0,3\n", "needs columns 'time_s' and 'unit'"),
    ("time_s,unit\n1.0,a\n99.0,a\n", "outside the recording"),
])
def test_bad_spike_tables_are_named(session, content, message):
    _, path, _, work = session
    bad = work / "bad.csv"
    bad.write_text(content)
    r = _run("--spikes", bad, "--recording", path, "--stim-freq", 20, "--out", work / "bad_out", "--no-efficiency")
    assert r.returncode == 2 and message in r.stderr and "Traceback" not in r.stderr
    assert not (work / "bad_out" / "lockcheck.json").exists()


def test_existing_outputs_are_not_overwritten(session):
    _, path, table, work = session
    out = work / "keep"
    out.mkdir()
    (out / "lockcheck.json").write_text("{}")
    r = _run("--spikes", table, "--recording", path, "--stim-freq", 20, "--out", out, "--no-efficiency")
    assert r.returncode == 2 and "--force" in r.stderr
    assert (out / "lockcheck.json").read_text() == "{}"


def test_spike_table_from_nix_spiketrains(tmp_path):
    # neo.io.NixIO as the writer of the reference file: one SpikeTrain per unit
    import neo
    import quantities as pq

    from artifactclean.lockcheck import read_spike_table

    blk = neo.Block()
    seg = neo.Segment()
    blk.segments.append(seg)
    seg.spiketrains.append(neo.SpikeTrain([0.5, 1.5, 2.5] * pq.s, t_stop=10 * pq.s, name="u7"))
    st = neo.SpikeTrain([300.0, 400.0] * pq.ms, t_stop=10 * pq.s)
    st.annotate(unit="u9")
    seg.spiketrains.append(st)
    path = tmp_path / "sorted.nix"
    io = neo.io.NixIO(str(path), mode="ow")
    io.write_block(blk)
    io.close()
    times, units = read_spike_table(path)
    got = sorted(zip(units.tolist(), np.round(times, 6).tolist()))
    assert got == [("u7", 0.5), ("u7", 1.5), ("u7", 2.5), ("u9", 0.3), ("u9", 0.4)]


def test_lockcheck_from_a_stimulation_table(tmp_path):
    # no recording: blocks given as a table, spikes locked to a known clock
    rng = np.random.default_rng(12)
    f, t0, t1 = 20.0, 2.0, 30.0
    n = 2000
    ph = rng.vonmises(np.radians(120.0), 1.5, n)
    cycles = rng.integers(int(t0 * f) + 1, int(t1 * f) - 1, n)
    times = np.sort((cycles + np.mod(ph, 2 * np.pi) / (2 * np.pi)) / f)  # phase 0 at t0 (phase_deg 0)
    with open(tmp_path / "spikes.csv", "w", newline="") as fh:
        w = csv.writer(fh)
        w.writerow(["time_s", "unit"])
        for t in times:
            w.writerow([f"{t:.7f}", "a"])
    (tmp_path / "blocks.csv").write_text(f"kind,start_s,stop_s,freq_hz,phase_deg\nactive,{t0},{t1},{f},0\n")
    (tmp_path / "eff.csv").write_text("phase_deg,recall\n" + "".join(f"{30 * i},1.0\n" for i in range(12)))
    out = tmp_path / "out"
    r = _run("--spikes", tmp_path / "spikes.csv", "--stim-table", tmp_path / "blocks.csv",
             "--efficiency", tmp_path / "eff.csv", "--out", out)
    assert r.returncode == 0, r.stderr
    res = json.loads((out / "lockcheck.json").read_text())
    row = next(x for x in res["units"] if x["condition"] == "stim 20 Hz")
    assert row["n_spikes"] == n and row["locked"]
    assert abs(row["preferred_phase_deg"] - 120.0) < 5.0
    assert abs(row["ppc"] - ppc(ph)) < 0.005
    assert res["efficiency"]["method"] == "supplied"
    r2 = _run("--spikes", tmp_path / "spikes.csv", "--out", tmp_path / "o2")
    assert r2.returncode == 2 and "--stim-table" in r2.stderr


def test_lockcheck_against_an_lfp_band(session):
    # spikes at the troughs of the 7 Hz oscillation of channel 0; phases from the cleaned .nix
    from scipy import signal

    rec, path, _, work = session
    nix = work / "cleaned.nix"
    if not nix.exists():
        r = subprocess.run([sys.executable, "-m", "artifactclean.cli", "clean", str(path), "-o", str(nix),
                            "--stim-freq", "20"], capture_output=True, text=True, timeout=600)
        assert r.returncode == 0, r.stderr
    # the reference phase: scipy.signal.hilbert of the band-passed artifact-free truth
    sos = signal.butter(4, [6.0, 8.0], btype="bandpass", fs=rec.fs, output="sos")
    truth_phase = np.angle(signal.hilbert(signal.sosfiltfilt(sos, rec.neural[0])))
    rng = np.random.default_rng(5)
    cand = np.flatnonzero(np.abs(np.angle(np.exp(1j * (truth_phase - np.pi)))) < 0.3)
    pick = np.sort(rng.choice(cand[(cand > rec.fs) & (cand < rec.data.shape[1] - rec.fs)], 800, replace=False))
    table = work / "lfp_spikes.csv"
    with open(table, "w", newline="") as fh:
        w = csv.writer(fh)
        w.writerow(["time_s", "unit"])
        for s in pick:
            w.writerow([f"{s / rec.fs:.6f}", "x"])
    out = work / "lfp_out"
    r = _run("--spikes", table, "--recording", path, "--stim-freq", 20, "--lfp", nix, "--lfp-band", 6, 8,
             "--out", out, "--no-efficiency")
    assert r.returncode == 0, r.stderr
    res = json.loads((out / "lockcheck.json").read_text())
    assert res["phase_source"].startswith("LFP 6-8 Hz")
    rows = [x for x in res["units"] if x["n_spikes"] > 50]
    for x in rows:
        # troughs: 180 degrees, and tightly locked
        assert abs(((x["preferred_phase_deg"] - 180.0) + 180) % 360 - 180) < 20.0, x
        assert x["ppc"] > 0.6 and x["locked"]
    r2 = _run("--spikes", table, "--recording", path, "--lfp", nix, "--out", work / "o3")
    assert r2.returncode == 2 and "--lfp-band" in r2.stderr
