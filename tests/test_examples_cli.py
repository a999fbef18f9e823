"""The examples and the command line run as a user would run them."""

import json
import subprocess
import sys
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]


@pytest.mark.parametrize("script", sorted((ROOT / "examples").glob("*.py")), ids=lambda p: p.name)
def test_example_runs(script, tmp_path):
    r = subprocess.run([sys.executable, str(script)], cwd=tmp_path, capture_output=True, text=True, timeout=300)
    assert r.returncode == 0, r.stderr
    assert r.stdout.strip()


def test_demo_command_writes_table_and_figures(tmp_path):
    out = tmp_path / "demo"
    r = subprocess.run([sys.executable, "-m", "artifactclean.cli", "demo", "--out", str(out)],
                       capture_output=True, text=True, timeout=300)
    assert r.returncode == 0, r.stderr
    assert "spike-band" in r.stdout and "LFP error" in r.stdout
    rows = {line.split()[0]: line.split() for line in r.stdout.splitlines() if line.split()[:1] and line.split()[0] in
            ("template", "comb", "regression", "pca", "adaptive")}
    assert set(rows) == {"template", "comb", "regression", "pca", "adaptive"}
    for name in ("traces.png", "spectra.png", "demo_scores.json"):
        assert (out / name).stat().st_size > 1000
    scores = json.loads((out / "demo_scores.json").read_text())
    assert set(scores) == set(rows)
    # the printed figure is the worst channel of the written one
    assert float(rows["template"][1]) == pytest.approx(max(scores["template"]["spikeband_residual"]), abs=6e-4)
    # the template beats the comb on the demo session at the harmonics
    assert max(scores["template"]["harmonic_residual"]) < max(scores["comb"]["harmonic_residual"])


def test_cli_errors_are_messages_not_tracebacks(tmp_path):
    r = subprocess.run([sys.executable, "-m", "artifactclean.cli", "demo", "--duration", "5", "--out", str(tmp_path)],
                       capture_output=True, text=True, timeout=60)
    assert r.returncode == 2
    assert "error: --duration" in r.stderr and "Traceback" not in r.stderr


def test_benchmark_prints_ratios():
    r = subprocess.run([sys.executable, str(ROOT / "benchmarks" / "throughput.py"), "--seconds", "4", "--repeat", "1"],
                       capture_output=True, text=True, timeout=300)
    assert r.returncode == 0, r.stderr
    assert "throughput / numpy.copyto" in r.stdout and "template" in r.stdout


@pytest.mark.parametrize("script, args, expect", [
    ("files.py", ["--seconds", "8", "--channels", "2"], "peak memory of clean, 4x / 1x"),
    ("workers.py", ["--channels", "4", "--seconds", "6", "--repeat", "1"], "compiled loop, 2 threads"),
    ("profile_default.py", ["--seconds", "6", "--top", "5"], "own share"),
    ("acceptance.py", ["--seconds", "6", "--freqs", "40", "--dac-rate", "5000", "--heart-hz", "1.2",
                       "--param", "tracking_hz=12"], "DAC rows at 5000 Hz, heart at 1.2 Hz, tracking_hz=12"),
    ("pieces.py", ["--seconds", "8", "--max-range", "3", "--method", "template", "comb"], "template"),
    ("clipping.py", ["--seconds", "6", "--rails", "3600", "--freqs", "40"], "outside rails"),
    ("stimulation_memory.py", ["--minutes", "1"], "4x / 1x peak memory"),
    ("segment_offset.py", ["--seconds", "6", "--freqs", "40", "--offsets", "0", "0.5"], "one-sign"),
    ("low_rates.py", ["--seconds", "6", "--freqs", "40", "--rates", "1000", "--methods", "template"], "upsampled"),
    ("level_drift.py", ["--seconds", "6", "--freqs", "40", "--methods", "template"], "offset+drift"),
])
def test_other_benchmarks_run_small(script, args, expect):
    # small sizes: the scripts must keep working; their figures come from full-size runs
    r = subprocess.run([sys.executable, str(ROOT / "benchmarks" / script), *args], capture_output=True, text=True,
                       timeout=600)
    assert r.returncode == 0, r.stderr[-2000:]
    assert expect in r.stdout
    if script == "workers.py":
        assert "False" not in r.stdout  # every way of running gave the same output
