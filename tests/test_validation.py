"""The validation suite can fail: a biased cleaner is flagged at its phases, the oracle is not."""

import json
import subprocess
import sys

import numpy as np
import pytest

from artifactclean.bench import synthetic_case
from artifactclean.demo_files import write_openephys_binary
from artifactclean.scenarios import make_scenario
from artifactclean.synthetic import ArtifactSpec, simulate_recording
from artifactclean.validation import evaluate_cleaner, method_cleaner, oracle_cleaner, rank_rows


@pytest.fixture(scope="module")
def case():
    return synthetic_case(make_scenario("modulated_20hz_dac", seed=0, duration_s=12.0), "modulated_20hz_dac")


def _blank_a_sixth(data, fs, model):
    # a deliberately biased cleaner: the template, then the sixth of each cycle from 60 to 120 degrees blanked
    y, lost = method_cleaner("template")(data, fs, model)
    ph = model.phase()
    y = y.copy()
    y[:, (ph >= np.pi / 3) & (ph < 2 * np.pi / 3)] = 0.0
    return y, lost


def _leave_a_harmonic(data, fs, model):
    # another: the template, plus a residual harmonic in the spike band (the 50th, 1 kHz) where the
    # fundamental is steepest, as a DAC staircase's leftover steps would be (10x the noise at its peak)
    y, lost = method_cleaner("template")(data, fs, model)
    ph = np.nan_to_num(model.phase())
    resid = 100.0 * np.cos(50 * ph) * np.abs(np.sin(ph)) ** 8
    return y + np.where(np.isfinite(model.phase()), resid, 0.0), lost


def _score(cleaner, case, seed=3):
    return evaluate_cleaner(cleaner, case["data"], case["fs"], case["model"], truth_neural=case["neural"],
                            noise_uv=case["noise_uv"], seed=seed)


def test_blanking_cleaner_is_flagged_at_its_phases(case):
    r = _score(_blank_a_sixth, case)
    assert r["phase_biased"]
    assert abs(r["delta_ppc_phase"]) > r["delta_ppc_phase_floor"]
    assert r["phase_recall_dip"] > r["phase_recall_dip_floor"]
    # 60-120 degrees is the second of six bins
    assert r["phase_bins_low"] == [1], r["recall_per_phase_bin"]


def test_harmonic_leaving_cleaner_is_flagged(case):
    r = _score(_leave_a_harmonic, case)
    assert r["phase_biased"]
    # the residual peaks at 90 and 270 degrees: detection in bins 60-120 and 240-300 (1 and 4) differs
    # from the rest by more than the floor (here the residual raises the threshold everywhere and
    # adds its own troughs to spikes at its phases, so those bins come out best, the others short)
    rec = np.asarray(r["recall_per_phase_bin"])
    at, rest = rec[[1, 4]], rec[[0, 2, 3, 5]]
    assert abs(at.mean() - rest.mean()) / rec.max() > r["phase_recall_dip_floor"], rec
    assert set(r["phase_bins_low"]) == {0, 2, 3, 5}


def test_oracle_and_template_are_not_flagged(case):
    oracle = _score(oracle_cleaner(case["artifact"]), case)
    for cleaner in (oracle_cleaner(case["artifact"]), method_cleaner("template")):
        r = _score(cleaner, case)
        assert not r["phase_biased"], (r["method"], r["delta_ppc_phase"], r["phase_recall_dip"])
        # the same injections for every method: the template recovers what the oracle does
        assert r["n_injected"] == oracle["n_injected"]
        assert r["recall"] >= oracle["recall"] - 0.01 and r["precision"] > 0.98
        assert r["waveform_correlation"] > 0.99 and abs(r["waveform_amplitude_ratio"] - 1) < 0.02
        assert abs(r["plv_error_phase"]) < 0.02


def test_ranking_puts_unbiased_first(case):
    rows = []
    for name, cl in (("biased", _blank_a_sixth), ("template", method_cleaner("template"))):
        r = _score(cl, case)
        r.update(method=name, params_label="default")
        rows.append(r)
    ranking = rank_rows(rows)
    assert [g["method"] for g in ranking] == ["template", "biased"]


def test_bench_on_an_open_ephys_recording(tmp_path):
    rec = simulate_recording(40.0, artifact=ArtifactSpec(freq_hz=20.0, dac_rate_hz=1000.0), seed=13)
    session = write_openephys_binary(tmp_path / "session", rec.data, rec.fs)
    before = sorted((p.name, p.read_bytes()) for p in session.rglob("*") if p.is_file())
    out = tmp_path / "bench"
    r = subprocess.run([sys.executable, "-m", "artifactclean.cli", "bench", str(session), "--stim-freq", "20",
                        "--out", str(out), "--methods", "template,comb", "--seeds", "0", "--write-hybrid"],
                       capture_output=True, text=True, timeout=600)
    assert r.returncode == 0, r.stderr
    assert sorted((p.name, p.read_bytes()) for p in session.rglob("*") if p.is_file()) == before
    res = json.loads((out / "results.json").read_text())
    rows = res["rows"]
    assert {row["method"] for row in rows} == {"template", "comb"}
    assert len(rows) == 3  # template default and n_cycles=15, comb
    assert all(any("phase" in k for k in row) for row in rows)
    for row in rows:
        assert len(row["recall_per_channel"]) == 4 and np.isfinite(row["sideband_excess"])
        assert min(row["recall_per_channel"]) <= row["recall"] <= max(row["recall_per_channel"])
    assert res["summary"]["recommended"]["method"] == "template"
    page = (out / "report.html").read_text()
    assert page.count("data:image/png;base64,") == 4 and "Ranking rule" in page
    for name in ("results.csv", "efficiency.png", "spectra.png", "waveforms.png", "ranking.png"):
        assert (out / name).stat().st_size > 500
    truth = (out / "hybrid_truth.csv").read_text().splitlines()
    assert truth[0].startswith("time_s,channel,unit,amplitude_uv") and len(truth) > 1000
    side = json.loads((out / "hybrid.json").read_text())
    assert (out / "hybrid.dat").stat().st_size == 2 * side["n_channels"] * side["n_samples"]
    # outputs are not overwritten without --force
    r2 = subprocess.run([sys.executable, "-m", "artifactclean.cli", "bench", "--synthetic", "--out", str(out)],
                        capture_output=True, text=True, timeout=60)
    assert r2.returncode == 2 and "--force" in r2.stderr


def test_bench_needs_one_source(tmp_path):
    r = subprocess.run([sys.executable, "-m", "artifactclean.cli", "bench", "--out", str(tmp_path / "x")],
                       capture_output=True, text=True, timeout=60)
    assert r.returncode == 2 and "--synthetic" in r.stderr


def test_score_sorting_pairs_units_and_counts(tmp_path):
    rng = np.random.default_rng(3)
    t0 = np.sort(rng.uniform(0, 10, 200))
    t1 = np.sort(rng.uniform(0, 10, 150))
    truth_t = np.concatenate([t0, t1])
    truth_u = np.array(["0"] * 200 + ["1"] * 150)
    # a sorter: unit "a" finds 180 of unit 0 (jittered 0.2 ms) plus 20 own spikes; "b" finds 100 of unit 1
    found0 = t0[:180] + 0.2e-3
    found1 = t1[:100] - 0.1e-3
    sorted_t = np.concatenate([found0, rng.uniform(0, 10, 20) + 0.5, found1])
    sorted_u = np.array(["a"] * 200 + ["b"] * 100)
    from artifactclean.validation import score_sorting

    res = {r["injected_unit"]: r for r in score_sorting(truth_t, truth_u, sorted_t, sorted_u)}
    # (a few of the 180 lose their match to a neighbouring true spike within the tolerance)
    assert res["0"]["sorted_unit"] == "a" and 170 <= res["0"]["n_matched"] <= 180
    assert res["0"]["precision"] == pytest.approx(res["0"]["n_matched"] / 200)
    assert res["1"]["sorted_unit"] == "b" and res["1"]["recall"] == pytest.approx(100 / 150, abs=0.02)
    # through the command line, from files
    import csv

    with open(tmp_path / "truth.csv", "w", newline="") as fh:
        w = csv.writer(fh)
        w.writerow(["time_s", "channel", "unit", "amplitude_uv", "phase_deg"])
        for t, u in zip(truth_t, truth_u):
            w.writerow([f"{t:.6f}", 0, u, 50, 0])
    with open(tmp_path / "sorted.csv", "w", newline="") as fh:
        w = csv.writer(fh)
        w.writerow(["time_s", "unit"])
        for t, u in zip(sorted_t, sorted_u):
            w.writerow([f"{t:.6f}", u])
    inputs = [(tmp_path / n).read_bytes() for n in ("truth.csv", "sorted.csv")]
    r = subprocess.run([sys.executable, "-m", "artifactclean.cli", "score-sorting", "--truth", str(tmp_path / "truth.csv"),
                        "--sorted", str(tmp_path / "sorted.csv"), "--json"], capture_output=True, text=True, timeout=60)
    assert r.returncode == 0, r.stderr
    assert {x["injected_unit"]: x["sorted_unit"] for x in json.loads(r.stdout)} == {"0": "a", "1": "b"}
    assert [(tmp_path / n).read_bytes() for n in ("truth.csv", "sorted.csv")] == inputs


def test_results_json_has_no_nan():
    from artifactclean.jsonsafe import plain

    out = plain({"a": np.float64("nan"), "b": [np.int64(3), np.array([1.0, np.inf])], "c": np.bool_(True)})
    assert out == {"a": None, "b": [3, [1.0, None]], "c": True}
    json.loads(json.dumps(out), parse_constant=lambda c: pytest.fail(f"non-JSON constant {c}"))
