"""Command line: ``artifactclean demo | survey | clean | bench | lockcheck``.

Errors are one line on stderr naming the problem and the way out, with a
non-zero exit code; ``--debug`` shows the traceback instead.
"""

from __future__ import annotations

import argparse
import json
import shlex
import sys
import time
from pathlib import Path

import numpy as np

from ._version import __version__


class _Bar:
    """A progress line on stderr, redrawn at most a few times a second."""

    def __init__(self, enabled: bool):
        self.enabled = enabled
        self._last = 0.0
        self._stage = None

    def __call__(self, done: int, total: int, stage: str) -> None:
        if not self.enabled:
            return
        now = time.monotonic()
        if stage == self._stage and done < total and now - self._last < 0.25:
            return
        self._last, self._stage = now, stage
        frac = done / max(total, 1)
        bar = "#" * int(30 * frac)
        end = "\n" if done >= total else ""
        sys.stderr.write(f"\r{stage:<9} [{bar:<30}] {100 * frac:5.1f}%{end}")
        sys.stderr.flush()


def _distinct(freqs: list, main: float):
    """The block frequencies, one per 2% cluster, the main one first; a single one as a number."""
    out = [main]
    for f in freqs:
        if all(abs(f - g) > 0.02 * g for g in out):
            out.append(f)
    return out[0] if len(out) == 1 else out


def _parser() -> argparse.ArgumentParser:
    p = argparse.ArgumentParser(
        prog="artifactclean",
        description="Remove alternating-current stimulation artifacts from electrophysiology recordings.",
    )
    p.add_argument("--version", action="version", version=f"artifactclean {__version__}")
    p.add_argument("--debug", action="store_true", help="show full tracebacks on errors")
    sub = p.add_subparsers(dest="command", required=True)

    d = sub.add_parser("demo", help="clean a built-in synthetic session with every method and score it")
    d.add_argument("--out", default="demo-out", help="directory for figures and scores (default: demo-out)")
    d.add_argument("--seed", type=int, default=7, help="seed of the synthetic session")
    d.add_argument("--duration", type=float, default=30.0, help="session length in seconds (>= 30)")

    def add_input(sp, positional=True):
        if positional:
            sp.add_argument("input", help="recording: a file or folder neo can read (Open Ephys, BrainVision, ...)")
        sp.add_argument("--format", help="neo rawio format name (e.g. OpenEphysBinary, BrainVision); guessed if omitted")
        sp.add_argument("--stream", help="signal stream by name, id or index (default: the first)")
        sp.add_argument("--block", type=int, default=0, help="neo block index (default 0)")
        sp.add_argument("--segment", type=int, default=0, help="neo segment index (default 0)")
        sp.add_argument("--channels", help="comma-separated channel names or indices (default: all but the monitor)")
        sp.add_argument("--stim-freq", type=float, nargs="+", metavar="HZ",
                        help="nominal stimulation frequency in Hz (refined from the data); several for a session "
                             "that delivers blocks at several frequencies")
        sp.add_argument("--stim-channel", help="stimulator monitor channel (name or index) to take the phase from")
        sp.add_argument("--profile", help="rig profile (TOML) saved by `survey --save-profile`")
        sp.add_argument("--quiet", action="store_true", help="no progress bar")

    s = sub.add_parser("survey", help="what to know before cleaning: blocks, frequency, drift, artifact, clipping")
    add_input(s)
    s.add_argument("--json", action="store_true", help="print a JSON object instead of a table")
    s.add_argument("--plot", metavar="PNG", help="save a figure of the blocks and per-channel artifact")
    s.add_argument("--save-profile", metavar="TOML", help="save a rig profile for later `clean` runs")
    s.add_argument("--force", action="store_true", help="overwrite an existing profile or figure")

    c = sub.add_parser("clean", help="clean a recording into .dat/.bin (int16 + JSON sidecar) or .nix")
    add_input(c)
    c.add_argument("-o", "--output", required=True, help="output path; the suffix (.dat, .bin, .nix) sets the type")
    c.add_argument("--method", help="cleaning method (default: template)")
    c.add_argument("--force", action="store_true", help="overwrite an existing output")
    c.add_argument("--gain-uv", type=float, help="int16 step in uV for .dat/.bin (default: the input's own)")
    c.add_argument("--chunk-seconds", type=_seconds, default=10.0, help="seconds read at a time (default 10)")
    c.add_argument("--task-seconds", type=_seconds, default=30.0,
                   help="memory of one cleaning task, in seconds of 4 channels (default 30); raise it when a "
                        "warning says pieces hold less context than the method needs (stimulation at 1-4 Hz)")
    c.add_argument("--workers", type=int, default=1,
                   help="threads cleaning groups of channels at once (default 1; 0: one per core); same output")
    c.add_argument("--cluster", metavar="ADDRESS",
                   help="dask scheduler address (tcp://host:8786): clean the pieces there, write here")

    g = sub.add_parser("bench", help="inject known spikes, run every method, rank them: built-in scenarios "
                                     "(--synthetic) or your own recording")
    g.add_argument("input", nargs="?", help="recording to make hybrid (omit with --synthetic)")
    g.add_argument("--synthetic", action="store_true", help="run the built-in synthetic scenarios")
    add_input(g, positional=False)
    g.add_argument("--out", required=True, help="output directory")
    g.add_argument("--methods", help="comma-separated methods (default: all)")
    g.add_argument("--seeds", default="0,1", help="comma-separated seeds of the injections (default 0,1)")
    g.add_argument("--seconds", type=float, default=60.0,
                   help="at most this much of a recording's main block is analysed (default 60)")
    g.add_argument("--write-hybrid", action="store_true",
                   help="also write the hybrid recording (hybrid.dat + sidecar) and its truth table (hybrid_truth.csv)")
    g.add_argument("--force", action="store_true", help="overwrite existing outputs in --out")

    q = sub.add_parser("score-sorting", help="score a spike sorter's output against a hybrid truth table")
    q.add_argument("--truth", required=True, help="hybrid_truth.csv written by `bench --write-hybrid`")
    q.add_argument("--sorted", required=True, help="the sorter's spikes: CSV with time_s,unit (or .npz, .nix)")
    q.add_argument("--tolerance-ms", type=float, default=0.5, help="matching tolerance (default 0.5 ms)")
    q.add_argument("--json", action="store_true", help="print JSON instead of a table")

    k = sub.add_parser("lockcheck", help="phase locking of sorted units per condition, tested against residue")
    k.add_argument("--spikes", required=True, help="spike table: CSV with time_s,unit; .npz (times, units); or .nix")
    k.add_argument("--recording", dest="input",
                   help="the raw recording the spikes were sorted from (for the stimulation model)")
    k.add_argument("--stim-table", help="instead of a recording: CSV of blocks (kind,start_s,stop_s,freq_hz"
                                        "[,phase_deg,amplitude]); the efficiency is then --efficiency or flat")
    k.add_argument("--efficiency", help="CSV phase_deg,recall: a detection efficiency measured elsewhere")
    k.add_argument("--lfp", help="phases against an LFP band instead of the stimulation: a cleaned recording "
                                 "(e.g. the .nix written by `clean`)")
    k.add_argument("--lfp-channel", default="0", help="channel of --lfp (name or index, default 0)")
    k.add_argument("--lfp-band", nargs=2, type=float, metavar=("LOW", "HIGH"), help="LFP band in Hz (with --lfp)")
    add_input(k, positional=False)
    k.add_argument("--out", required=True, help="output directory")
    k.add_argument("--method", default="template", help="cleaning method whose detection efficiency is the null")
    k.add_argument("--alpha", type=float, default=0.05, help="significance level (default 0.05)")
    k.add_argument("--equivalence", nargs=2, type=float, metavar=("LOW", "HIGH"),
                   help="bounds on the per-block PPC difference stimulation - sham for an equivalence test")
    k.add_argument("--permutations", type=int, default=1000, help="block-label permutations (default 1000)")
    k.add_argument("--seed", type=int, default=0, help="seed of every random choice (recorded in the output)")
    k.add_argument("--efficiency-seconds", type=float, default=120.0,
                   help="at most this much of the main block is used to measure detection efficiency")
    k.add_argument("--no-efficiency", action="store_true", help="skip the injection; flat efficiency (no residue null)")
    k.add_argument("--force", action="store_true", help="overwrite existing outputs in --out")
    return p


def _profile_settings(args) -> dict:
    if not getattr(args, "profile", None):
        return {}
    from .io.profile import load_profile

    return load_profile(args.profile)


def _open(args, prof: dict):
    from .io.reader import NeoRecording

    rp = prof.get("recording", {})
    fmt = args.format or rp.get("format")
    stream = args.stream if args.stream is not None else rp.get("stream")
    rec = NeoRecording(args.input, format=fmt, stream=stream, block=args.block, segment=args.segment)
    chans = args.channels.split(",") if args.channels else rp.get("channels")
    channels = [rec.channel_index(c.strip() if isinstance(c, str) else c) for c in chans] if chans else None
    mon_name = args.stim_channel or rp.get("monitor_channel")
    monitor = None
    if mon_name:
        try:
            monitor = (rec, rec.channel_index(mon_name))
        except ValueError:
            # Open Ephys puts ADC channels in their own stream: look there
            for i in range(len(rec._r.header["signal_streams"])):
                other = NeoRecording(args.input, format=fmt, stream=i, block=args.block, segment=args.segment)
                if mon_name in other.channel_names:
                    monitor = (other, other.channel_index(mon_name))
                    break
            else:
                raise
    sp = prof.get("stimulation", {})
    stim_freq = args.stim_freq if args.stim_freq is not None else sp.get("nominal_freq_hz")
    if isinstance(stim_freq, list) and len(stim_freq) == 1:
        stim_freq = stim_freq[0]
    return rec, channels, monitor, stim_freq


def _survey(args) -> int:
    from .io.pipeline import survey_recording

    prof = _profile_settings(args)
    rec, channels, monitor, stim_freq = _open(args, prof)
    for path in (args.save_profile, args.plot):
        if path and Path(path).exists() and not args.force:
            raise ValueError(f"{path} exists; pass --force to overwrite")
    res = survey_recording(rec, channels=channels, stim_freq=stim_freq, monitor=monitor,
                           progress=_Bar(not (args.quiet or args.json) and sys.stderr.isatty()))
    res["format"] = rec.format
    res["stream"] = rec.stream_name
    if args.json:
        print(json.dumps(res, indent=2, default=str))
    else:
        _print_survey(res)
    if args.plot:
        from .plotting import plot_survey

        plot_survey(Path(args.plot), res)
        if not args.json:
            print(f"figure written to {args.plot}")
    if args.save_profile:
        from .io.profile import save_profile

        st = res["stimulation"]
        freqs = [b["freq_hz"] for b in st["blocks"] if b["kind"] != "off"]
        save_profile(args.save_profile, dict(
            recording=dict(format=rec.format, stream=rec.stream_name, channels=[c["name"] for c in res["channels"]],
                           monitor_channel=args.stim_channel or prof.get("recording", {}).get("monitor_channel")),
            stimulation=dict(nominal_freq_hz=stim_freq if stim_freq is not None else _distinct(freqs, st["frequency_hz"]),
                             frequencies_hz=freqs,
                             blocks=[[b["start_s"], b["stop_s"], b["kind"]] for b in st["blocks"]],
                             events=[[e["time_s"], e["duration_s"], e["label"]] for e in res["events"]]),
            cleaning=dict(method=prof.get("cleaning", {}).get("method", "template"),
                          params=prof.get("cleaning", {}).get("params", {})),
        ), force=args.force)
        if not args.json:
            print(f"rig profile written to {args.save_profile}")
    return 0


def _print_survey(res: dict) -> None:
    st = res["stimulation"]
    print(f"{res['input']}  ({res['format']}, stream {res['stream']!r})")
    print(f"{len(res['channels'])} channels at {res['sampling_rate_hz']:g} Hz, {res['duration_s']:.2f} s")
    f = st["frequency_hz"]
    print(f"stimulation: {'none found' if f is None else f'{f:.6f} Hz (main block)'}; phase from {st['reference']}")
    dac = st.get("dac", {})
    if dac.get("locked") and (dac.get("cycles_per_period") or 1) > 1:
        print(f"DAC staircase: {dac['ticks_per_cycle']} updates every {dac['cycles_per_period']} cycles "
              "(modelled exactly by the template)")
    elif dac.get("locked"):
        print(f"DAC staircase: {dac['ticks_per_cycle']} updates per cycle (modelled exactly)")
    elif dac.get("updates_per_cycle"):
        print(f"DAC staircase: {dac['updates_per_cycle']:.4f} updates per cycle, free-running "
              "(the template reads each tick's held phase)")
    elif dac.get("steps_per_s", 0) > 50:
        print(f"DAC staircase: {dac['steps_per_s']:.0f} steps/s, not locked to the cycle (not modelled)")
    if st.get("upsampled_by", 1) > 1:
        print(f"{res['sampling_rate_hz'] / f:.1f} samples per cycle: the template cleans on a copy upsampled "
              f"{st['upsampled_by']}x, regression and PCA on one of 400 a cycle (no DAC staircase is searched; its "
              "images are harmonics of the cycle)")
    print(f"\n{'kind':<7} {'start s':>9} {'stop s':>9} {'ramp up s':>10} {'ramp down s':>12} {'ramps':>7} {'freq Hz':>12} "
          f"{'drift ppm':>10} {'amplitude uV':>13}")
    for b in st["blocks"]:
        if b["kind"] == "off":
            print(f"{'off':<7} {b['start_s']:>9.3f} {b['stop_s']:>9.3f}")
        else:
            drift = "" if b["drift_ppm"] is None else f"{b['drift_ppm']:+.1f}"
            ramps = b.get("ramp_shape", "linear") if b["ramp_up_s"] > 0 or b["ramp_down_s"] > 0 else "none"
            print(f"{b['kind']:<7} {b['start_s']:>9.3f} {b['stop_s']:>9.3f} {b['ramp_up_s']:>10.2f} {b['ramp_down_s']:>12.2f} "
                  f"{ramps:>7} {b['freq_hz']:>12.6f} {drift:>10} {b['amplitude']:>13.0f}")
    print(f"\n{'channel':<12} {'artifact uV':>12} {'SD uV':>10} {'clipped %':>10}  recommended")
    for c in res["channels"]:
        print(f"{c['name']:<12} {c['artifact_amplitude_uv']:>12.1f} {c['sd_uv']:>10.1f} {100 * c['clipped_fraction']:>10.3f}  "
              f"{c['recommended_method']} {c['note']}")
    if res["events"]:
        print(f"\n{len(res['events'])} event(s) in the file, first: {res['events'][0]}")


def _seconds(text: str) -> float:
    """A positive, finite number of seconds (argparse type: its error names the option)."""
    try:
        v = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"not a number of seconds: {text!r}") from None
    if not (v > 0 and v < float("inf")):
        raise argparse.ArgumentTypeError(f"must be a positive number of seconds, got {text}")
    return v


def _clean(args) -> int:
    from .io.pipeline import clean_recording

    prof = _profile_settings(args)
    rec, channels, monitor, stim_freq = _open(args, prof)
    cp = prof.get("cleaning", {})
    method = args.method or cp.get("method", "template")
    params = cp.get("params", {}) if method == cp.get("method", method) else {}
    out = clean_recording(rec, args.output, channels=channels, method=method, params=params, stim_freq=stim_freq,
                          monitor=monitor, force=args.force, gain_uv=args.gain_uv, chunk_s=args.chunk_seconds,
                          max_range_s=args.task_seconds, progress=_Bar(not args.quiet and sys.stderr.isatty()),
                          workers=args.workers, cluster=args.cluster,
                          command="artifactclean " + " ".join(shlex.quote(a) for a in sys.argv[1:]))
    st = out["stimulation"]
    n_blocks = sum(1 for b in st["blocks"] if b["kind"] != "off")
    freq = "none found" if st["frequency_hz"] is None else f"{st['frequency_hz']:.6f} Hz"
    print(f"cleaned {n_blocks} stimulation block(s) ({freq}) with {method!r}")
    for p in out["written"]:
        print(f"wrote {p}")
    if out["clipped_stretches"]:
        print(f"{len(out['clipped_stretches'])} lost stretch(es) (clipped samples, and any phase the cleaning "
              "could not recover next to them) blanked and listed in the output")
    if out["saturated"]:
        print(f"warning: {out['saturated']} samples exceeded int16 at {out['gain_uv']} uV/bit and were clamped; "
              "pass a larger --gain-uv", file=sys.stderr)
    return 0


def _bench(args) -> int:
    from .bench import SYNTHETIC_SCENARIOS, check_bench_out, run_bench, synthetic_cases, write_report
    from .spikes import check_spike_rate

    if args.synthetic == bool(args.input):
        raise ValueError("give either a recording or --synthetic (not both, not neither)")
    try:
        seeds = [int(x) for x in args.seeds.split(",") if x.strip()]
    except ValueError:
        raise ValueError(f"--seeds must be comma-separated integers, got {args.seeds!r}") from None
    methods = [m.strip() for m in args.methods.split(",")] if args.methods else None
    out = Path(args.out)
    check_bench_out(out, args.force)
    bar = _Bar(not args.quiet and sys.stderr.isatty())
    if args.synthetic:
        print(f"building the built-in scenarios: {', '.join(SYNTHETIC_SCENARIOS)} (12 s, 4 channels, 30 kHz)")
        cases = synthetic_cases()
        title = "artifactclean bench: built-in synthetic scenarios"
    else:
        from .io.pipeline import fit_recording_stimulation, scan_recording

        prof = _profile_settings(args)
        rec, channels, monitor, stim_freq = _open(args, prof)
        check_spike_rate(rec.fs, "bench's known spikes")  # before any work on the recording
        channels = list(range(rec.n_channels)) if channels is None else channels
        scan = scan_recording(rec, channels, progress=bar)
        model = fit_recording_stimulation(rec, channels, scan, stim_freq=stim_freq, monitor=monitor)
        main = model.main_block
        if main is None:
            raise ValueError("no stimulation found in the recording; pass --stim-freq, or --stim-channel with a monitor")
        half = int(min(args.seconds * rec.fs, main.stop - main.start) // 2)
        mid = (main.start + main.stop) // 2
        a, b = max(0, mid - half - int(2 * rec.fs)), min(rec.n_samples, mid + half + int(2 * rec.fs))
        print(f"hybrid recording: known spikes injected into {(b - a) / rec.fs:.0f} s of the main block "
              f"({main.freq_hz:.4f} Hz)")
        cases = [dict(name=Path(args.input).name, data=rec.read(a, b, channels), fs=rec.fs, model=model.window(a, b))]
        title = f"artifactclean bench: {Path(args.input).name} (hybrid)"
    rows = run_bench(cases, methods=methods, seeds=seeds, progress=bar)
    summary = write_report(out, rows, cases, title=title, force=args.force,
                           command="artifactclean " + " ".join(shlex.quote(x) for x in sys.argv[1:]))
    if args.write_hybrid:
        _write_hybrid(out, cases[0], seeds[0], args.force)
    print(f"{'rank':>4} {'method':<11} {'parameters':<16} {'biased':>6} {'recall':>7} {'residual':>9}")
    for g in summary["ranking"]:
        print(f"{g['rank']:>4} {g['method']:<11} {g['params_label']:<16} {'yes' if g['phase_biased'] else 'no':>6} "
              f"{g['recall']:>7.4f} {g['residual']:>9.3g}")
    rec_ = summary["recommended"]
    if rec_:
        print(f"recommended: {rec_['method']} {rec_['params'] or '(default parameters)'}")
    print(f"wrote {out}/report.html, results.json, results.csv and figures")
    return 0


def _write_hybrid(out: Path, case: dict, seed: int, force: bool) -> None:
    from .injection import write_truth_csv
    from .io.writers import DatWriter
    from .validation import make_hybrid

    for name in ("hybrid.dat", "hybrid_truth.csv"):
        if (out / name).exists() and not force:
            raise ValueError(f"{out / name} exists; pass --force to overwrite")
    from .injection import cleaned_noise
    from .validation import method_cleaner

    base, lost = method_cleaner("template")(case["data"], case["fs"], case["model"])
    sigma = cleaned_noise(base, lost, case["fs"])
    hyb, uni, lck = make_hybrid(case["data"], case["fs"], case["model"].phase(), noise_uv=sigma, avoid_in=base,
                                seed=seed)
    n_ch = hyb.shape[0]
    w = DatWriter(out / "hybrid.dat", case["fs"], [f"ch{i}" for i in range(n_ch)], hyb.shape[1])
    try:
        w.write(hyb)
        w.close(dict(content="hybrid recording: the analysed stretch plus injected spikes", seed=seed))
    except BaseException:
        w.abort()
        raise
    import dataclasses

    both = dataclasses.replace(uni, **{f: np.concatenate([getattr(uni, f), getattr(lck, f)])
                                      for f in ("samples", "channels", "units", "amplitudes_uv", "phases")})
    order = np.argsort(both.samples, kind="stable")
    both = dataclasses.replace(both, **{f: getattr(both, f)[order]
                                        for f in ("samples", "channels", "units", "amplitudes_uv", "phases")})
    write_truth_csv(out / "hybrid_truth.csv", both)


def _score_sorting(args) -> int:
    import csv as _csv

    from .lockcheck import read_spike_table
    from .validation import score_sorting

    with open(args.truth, newline="") as fh:
        rows = list(_csv.DictReader(fh))
    if not rows or "time_s" not in rows[0] or "unit" not in rows[0]:
        raise ValueError(f"{args.truth} is not a truth table (columns time_s, channel, unit, ...)")
    tt = np.array([float(r["time_s"]) for r in rows])
    tu = np.array([r["unit"] for r in rows])
    st, su = read_spike_table(args.sorted)
    res = score_sorting(tt, tu, st, su, tolerance_s=args.tolerance_ms * 1e-3)
    if args.json:
        print(json.dumps(res, indent=2))
        return 0
    print(f"{'injected':>8} {'sorted':>8} {'n inj':>6} {'n sorted':>8} {'matched':>7} {'recall':>7} {'precision':>9}")
    for r in res:
        print(f"{r['injected_unit']:>8} {r['sorted_unit']:>8} {r['n_injected']:>6} {r['n_sorted']:>8} "
              f"{r['n_matched']:>7} {r['recall']:>7.3f} {r['precision']:>9.3f}")
    return 0


def _lockcheck(args) -> int:
    from .io.pipeline import fit_recording_stimulation, scan_recording
    from .entrainment import check_spike_times
    from .lockcheck import check_out_dir, measure_efficiency, read_spike_table

    if not 0 < args.alpha < 1:
        raise ValueError(f"--alpha must be in (0, 1), got {args.alpha}")
    check_out_dir(Path(args.out), args.force)
    if bool(args.input) == bool(args.stim_table):
        raise ValueError("give either --recording or --stim-table (not both, not neither)")
    times, units = read_spike_table(args.spikes)
    if args.stim_table:
        from .lockcheck import read_efficiency, read_stim_table

        model = read_stim_table(args.stim_table, duration_s=float(times.max()) + 1.0)
        eff = read_efficiency(args.efficiency) if args.efficiency else None
        return _lockcheck_report(args, times, units, model, eff)
    prof = _profile_settings(args)
    rec, channels, monitor, stim_freq = _open(args, prof)
    channels = list(range(rec.n_channels)) if channels is None else channels
    bar = _Bar(not args.quiet and sys.stderr.isatty())
    scan = scan_recording(rec, channels, progress=bar)
    model = fit_recording_stimulation(rec, channels, scan, stim_freq=stim_freq, monitor=monitor)
    if not model.blocks:
        raise ValueError("no stimulation found in the recording; pass --stim-freq, or --stim-channel with a monitor")
    check_spike_times(times, rec.n_samples / rec.fs)
    eff = None
    if args.efficiency:
        from .lockcheck import read_efficiency

        eff = read_efficiency(args.efficiency)
    elif not args.no_efficiency:
        main = model.main_block
        half = int(min(args.efficiency_seconds * rec.fs, main.stop - main.start) // 2)
        mid = (main.start + main.stop) // 2
        a, b = max(0, mid - half - int(2 * rec.fs)), min(rec.n_samples, mid + half + int(2 * rec.fs))
        print(f"measuring detection efficiency: spikes injected into {(b - a) / rec.fs:.0f} s of the main block, "
              f"cleaned with {args.method!r}", file=sys.stderr)
        eff = measure_efficiency(rec.read(a, b, channels), rec.fs, model.window(a, b), method=args.method,
                                 seed=args.seed)
    return _lockcheck_report(args, times, units, model, eff)


def _lockcheck_report(args, times, units, model, eff) -> int:
    from .lockcheck import lfp_spike_phases, run_lockcheck, write_lockcheck

    phases = None
    if args.lfp:
        from .io.reader import open_recording

        if not args.lfp_band:
            raise ValueError("--lfp needs --lfp-band LOW HIGH (Hz)")
        lrec = open_recording(args.lfp)
        if abs(lrec.n_samples / lrec.fs - model.n_samples / model.fs) > 1.0 / model.fs * 2 and args.input:
            raise ValueError(f"--lfp lasts {lrec.n_samples / lrec.fs:.3f} s, the recording "
                             f"{model.n_samples / model.fs:.3f} s: they must be the same session")
        phases = lfp_spike_phases(lrec, lrec.channel_index(args.lfp_channel), times, tuple(args.lfp_band))
        # an LFP phase carries no stimulation-phase detection bias: the efficiency null does not apply
        eff = None
    elif args.lfp_band:
        raise ValueError("--lfp-band needs --lfp (the cleaned recording to take the LFP from)")
    res = run_lockcheck(times, units, model, efficiency=eff, alpha=args.alpha, phases=phases,
                        equivalence=tuple(args.equivalence) if args.equivalence else None,
                        n_perm=args.permutations, seed=args.seed)
    res["phase_source"] = (f"LFP {args.lfp_band[0]:g}-{args.lfp_band[1]:g} Hz of {args.lfp} channel {args.lfp_channel}"
                           if args.lfp else "stimulation")
    res["command"] = "artifactclean " + " ".join(shlex.quote(x) for x in sys.argv[1:])
    paths = write_lockcheck(Path(args.out), res, times, units, model, phases=phases, force=args.force)
    print(f"{'unit':>6} {'condition':<14} {'spikes':>7} {'PPC':>8} {'phase':>6} {'p':>9} {'p residue':>10}  verdict")
    for r in res["units"]:
        verdict = "locked" if r["locked"] else ("within residue null" if r["flagged_residue"] else "not locked")
        ph = "" if not np.isfinite(r["preferred_phase_deg"]) else f"{r['preferred_phase_deg']:.0f}"
        print(f"{str(r['unit']):>6} {r['condition']:<14} {r['n_spikes']:>7} {r['ppc']:>8.4f} {ph:>6} "
              f"{r['p_value']:>9.2e} {r['p_value_residue']:>10.2e}  {verdict}")
    for p in paths:
        print(f"wrote {p}")
    return 0


def _show_warning(message, category, filename, lineno, file=None, line=None):
    # one readable line per warning, not the Python source location
    print(f"artifactclean: warning: {message}", file=sys.stderr)


def main(argv=None) -> int:
    from .parallel import ClusterError

    args = _parser().parse_args(argv)
    import warnings

    if not args.debug:
        warnings.showwarning = _show_warning
    try:
        if args.command == "demo":
            from .demo import run_demo

            if args.duration < 30:
                raise ValueError("--duration must be at least 30 s (the demo session has three blocks)")
            run_demo(args.out, seed=args.seed, duration_s=args.duration)
            return 0
        if args.command == "survey":
            return _survey(args)
        if args.command == "clean":
            return _clean(args)
        if args.command == "lockcheck":
            return _lockcheck(args)
        if args.command == "bench":
            return _bench(args)
        if args.command == "score-sorting":
            return _score_sorting(args)
        return 2
    except KeyboardInterrupt:
        print("artifactclean: interrupted; no output was left behind", file=sys.stderr)
        return 130
    except (ValueError, TypeError, OSError, ImportError, ClusterError) as exc:
        if args.debug:
            raise
        print(f"artifactclean: error: {exc}", file=sys.stderr)
        return 2


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
