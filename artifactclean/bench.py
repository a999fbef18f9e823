"""``artifactclean bench``: every method on built-in scenarios or on the user's own recording, ranked.

For each scenario (or the user's recording, made hybrid by injecting known
spikes), each method and parameter set of a small grid, and each seed,
:func:`artifactclean.validation.evaluate_cleaner` gives one row. The rows go
to ``results.json`` and ``results.csv``; figures (detection efficiency
against phase per method, residual spectra, waveform overlays, a ranking
chart) and ``report.html`` (figures embedded, the ranking by
:data:`~artifactclean.validation.RANKING_RULE`, the recommended method and
parameters) are written beside them.
"""

from __future__ import annotations

import base64
import csv
import datetime
import html
import io
import json
from pathlib import Path

import numpy as np
from scipy import signal

from ._version import __version__
from .jsonsafe import plain
from .validation import RANKING_RULE, evaluate_cleaner, method_cleaner, oracle_cleaner, rank_rows, relative_to_oracle

__all__ = ["PARAM_GRID", "SYNTHETIC_SCENARIOS", "OUTPUT_NAMES", "check_bench_out", "run_bench", "synthetic_case",
           "synthetic_cases", "write_report"]

#: method -> parameter sets tried (the first is the default)
PARAM_GRID = {
    "template": [{}, {"n_cycles": 15}],
    "regression": [{}, {"keep_factor": 8.0}],
    "pca": [{}, {"n_components": 4}],
    "adaptive": [{}],
    "comb": [{}],
}

#: the built-in scenarios of ``bench --synthetic`` (see :mod:`artifactclean.scenarios`)
SYNTHETIC_SCENARIOS = ("modulated_10hz", "modulated_20hz_dac", "modulated_40hz", "clipped_20hz_dac")

OUTPUT_NAMES = ("results.json", "results.csv", "report.html", "efficiency.png", "spectra.png", "waveforms.png",
                "ranking.png")

_CSV_COLUMNS = ["scenario", "seed", "method", "params_label", "recall", "precision", "phase_recall_dip",
                "phase_recall_dip_floor", "delta_ppc_phase", "delta_ppc_phase_floor", "phase_biased",
                "phase_biased_absolute", "delta_ppc_vs_oracle", "phase_recall_dip_vs_oracle", "plv_error_phase", "preferred_phase_error_deg", "waveform_correlation", "waveform_amplitude_ratio",
                "spikeband_residual", "lfp_band_ratio", "lfp_error_away", "harmonic_excess", "sideband_excess", "lost_fraction",
                "seconds"]


def _label(params: dict) -> str:
    return "default" if not params else ",".join(f"{k}={v}" for k, v in sorted(params.items()))


def check_bench_out(out: Path, force: bool) -> None:
    """Refuse an output directory that already holds bench outputs, unless ``force``."""
    out = Path(out)
    there = [n for n in OUTPUT_NAMES if (out / n).exists()]
    if there and not force:
        raise ValueError(f"{out} already holds {', '.join(there)}; pass --force to overwrite")


def synthetic_case(rec, name: str) -> dict:
    """A bench case from a :class:`~artifactclean.synthetic.SyntheticRecording` (truth included)."""
    from .stimulation import fit_stimulation

    nominal = next((b["nominal_freq_hz"] for b in rec.blocks if b["kind"] == "active"), None)
    model = fit_stimulation(rec.data, rec.fs, stim_freq=nominal)
    return dict(name=name, data=rec.data, fs=rec.fs, model=model, neural=rec.neural,
                artifact=rec.data - rec.neural, noise_uv=rec.spec["neural"]["noise_uv"])


def synthetic_cases(names=SYNTHETIC_SCENARIOS, *, duration_s: float = 12.0, seed: int = 0) -> list[dict]:
    """Bench cases of the built-in scenarios."""
    from .scenarios import make_scenario

    return [synthetic_case(make_scenario(n, seed=seed, duration_s=duration_s), n) for n in names]


def run_bench(cases, *, methods=None, grid=None, seeds=(0, 1), progress=None, echo=None) -> list[dict]:
    """Evaluate every method and parameter set on every case and seed.

    Parameters
    ----------
    cases : list of dict
        Each ``{"name", "data", "fs", "model"}`` and, for synthetic cases,
        ``"neural"`` (the truth), ``"artifact"`` and ``"noise_uv"``.
    methods : list of str, optional
        Default: every method in :data:`PARAM_GRID`.
    grid : dict, optional
        Parameter sets per method (default :data:`PARAM_GRID`).
    seeds : sequence of int
    progress : callable, optional
        ``progress(done, total, stage)``.

    Returns
    -------
    list of dict
        One row per case x method x parameter set x seed (oracle rows for synthetic cases).
    """
    grid = PARAM_GRID if grid is None else grid
    methods = list(grid) if methods is None else list(methods)
    unknown = [m for m in methods if m not in grid]
    if unknown:
        raise ValueError(f"unknown method(s) {unknown}; choose from {sorted(grid)}")
    # the oracle first: the other rows of a synthetic case are judged beyond its phase figures
    jobs = [(c, "oracle", {}, s) for c in cases if c.get("artifact") is not None for s in seeds]
    jobs += [(c, m, p, s) for c in cases for m in methods for p in grid[m] for s in seeds]
    oracles = {}
    rows = []
    kept_spectra = set()
    for i, (case, m, params, seed) in enumerate(jobs):
        if progress:
            progress(i, len(jobs), "bench")
        cleaner = oracle_cleaner(case["artifact"]) if m == "oracle" else method_cleaner(m, **params)
        if case.get("neural") is None and "reference" not in case:
            # a recording of one's own: the injections refer to its template-cleaned version
            case["reference"] = method_cleaner("template")(case["data"], case["fs"], case["model"])[0]
        row = evaluate_cleaner(cleaner, case["data"], case["fs"], case["model"], truth_neural=case.get("neural"),
                               noise_uv=case.get("noise_uv"), injection_reference=case.get("reference"),
                               seed=seed, name=m)
        row.update(scenario=case["name"], seed=seed, params=params, params_label=_label(params))
        if m == "oracle":
            oracles[(case["name"], seed)] = row
        elif (case["name"], seed) in oracles:
            relative_to_oracle(row, oracles[(case["name"], seed)])
        key = (case["name"], m)
        # the first case's cleaned trace per method feeds the spectra figure; the rest is dropped
        src = row.pop("_spectrum_source")
        if case is cases[0] and seed == seeds[0] and not params and key not in kept_spectra:
            kept_spectra.add(key)
            row["_spectrum_source"] = src[0]
        rows.append(row)
        if echo:
            echo(f"  {case['name']:<22} {m:<10} {_label(params):<16} seed {seed}: recall {row['recall']:.3f}  "
                 f"delta PPC {row['delta_ppc_phase']:+.1e}  {'BIASED' if row['phase_biased'] else 'unbiased'}")
    if progress:
        progress(len(jobs), len(jobs), "bench")
    return rows


def _png(fig) -> bytes:
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=100)
    return buf.getvalue()


def _figures(rows, cases) -> dict:
    from .plotting import _plt

    plt = _plt()
    figs = {}
    defaults = [r for r in rows if r["params_label"] == "default"]
    methods = list(dict.fromkeys(r["method"] for r in defaults))
    # detection efficiency against phase, per method (mean over cases and seeds)
    fig, ax = plt.subplots(figsize=(7, 4))
    for m in methods:
        rs = [r["recall_per_phase_bin"] for r in defaults if r["method"] == m]
        edges = np.asarray(defaults[0]["phase_bin_edges_deg"])
        centres = 0.5 * (edges[1:] + edges[:-1])
        ax.plot(centres, np.nanmean(np.asarray(rs, dtype=float), axis=0), marker="o", label=m)
    ax.set_xlabel("stimulation phase (deg)")
    ax.set_ylabel("recall of injected spikes")
    ax.set_xlim(0, 360)
    ax.set_title("detection efficiency against stimulation phase")
    ax.legend(fontsize=8)
    fig.tight_layout()
    figs["efficiency.png"] = _png(fig)
    plt.close(fig)
    # residual spectra on the first case
    case = cases[0]
    fig, ax = plt.subplots(figsize=(7, 4))
    fs = case["fs"]
    nper = int(min(case["data"].shape[1], 2 * fs))
    f, p = signal.welch(case["data"][0], fs=fs, nperseg=nper)
    sel = f <= 200
    ax.semilogy(f[sel], p[sel], color="0.6", lw=0.8, label="recorded")
    for r in rows:
        if "_spectrum_source" in r:
            f, p = signal.welch(r["_spectrum_source"], fs=fs, nperseg=nper)
            ax.semilogy(f[sel], p[sel], lw=0.8, label=r["method"])
    if case.get("neural") is not None:
        f, p = signal.welch(case["neural"][0], fs=fs, nperseg=nper)
        ax.semilogy(f[sel], p[sel], color="k", lw=1.2, label="artifact-free truth")
    ax.set_xlabel("frequency (Hz)")
    ax.set_ylabel("PSD (uV^2/Hz)")
    ax.set_title(f"{case['name']}, channel 0: spectra after cleaning")
    ax.legend(fontsize=7)
    fig.tight_layout()
    figs["spectra.png"] = _png(fig)
    plt.close(fig)
    # waveform overlays (first case, first seed, channel 0)
    firsts = {}
    for r in defaults:
        if r["scenario"] == case["name"] and r["method"] not in firsts and r["_waveforms"]:
            firsts[r["method"]] = r["_waveforms"]
    fig, axes = plt.subplots(1, max(len(firsts), 1), figsize=(2.4 * max(len(firsts), 1) + 0.5, 2.8), squeeze=False)
    for ax, (m, w) in zip(axes[0], firsts.items()):
        ch = sorted(w)[0]
        lags, got, want = (np.asarray(v) for v in w[ch])
        ax.plot(lags / fs * 1e3, want, color="k", lw=1.5, label="injected")
        ax.plot(lags / fs * 1e3, got, color="tab:red", lw=1.0, label="recovered")
        ax.set_title(m, fontsize=9)
        ax.set_xlabel("ms")
    axes[0][0].legend(fontsize=7)
    axes[0][0].set_ylabel("spike band (uV)")
    fig.tight_layout()
    figs["waveforms.png"] = _png(fig)
    plt.close(fig)
    # ranking chart
    ranking = rank_rows([r for r in rows if r["method"] != "oracle"])
    fig, ax = plt.subplots(figsize=(7, 0.35 * len(ranking) + 1.2))
    names = [f"{g['rank']}. {g['method']} ({g['params_label']})" for g in ranking][::-1]
    vals = [g["recall"] for g in ranking][::-1]
    colours = ["tab:red" if g["phase_biased"] else "tab:green" for g in ranking][::-1]
    ax.barh(names, vals, color=colours)
    ax.set_xlim(min(0.9, min(vals) - 0.02) if vals else 0, 1.0)
    ax.set_xlabel("recall of injected spikes (red: phase-biased)")
    ax.set_title("ranking")
    fig.tight_layout()
    figs["ranking.png"] = _png(fig)
    plt.close(fig)
    return figs


def _clean_row(r: dict) -> dict:
    return plain({k: v for k, v in r.items() if not k.startswith("_")})


def write_report(out: Path, rows: list[dict], cases: list[dict], *, title: str, command: str = "",
                 force: bool = False) -> dict:
    """Write results, figures and ``report.html`` into ``out``; return the summary (ranking, recommendation)."""
    out = Path(out)
    check_bench_out(out, force)
    out.mkdir(parents=True, exist_ok=True)
    clean_rows = [_clean_row(r) for r in rows]
    ranking = rank_rows([r for r in rows if r["method"] != "oracle"])
    best = ranking[0] if ranking else None
    summary = dict(ranking_rule=RANKING_RULE, ranking=ranking,
                   recommended=None if best is None else dict(method=best["method"], params=best["params"]),
                   version=__version__, command=command, created=datetime.datetime.now().isoformat(timespec="seconds"),
                   seeds=sorted({r["seed"] for r in rows}))
    (out / "results.json").write_text(json.dumps(plain(dict(rows=clean_rows, summary=summary)), indent=2))
    with open(out / "results.csv", "w", newline="") as fh:
        w = csv.writer(fh)
        w.writerow(_CSV_COLUMNS)
        for r in clean_rows:
            w.writerow(["" if r.get(c) is None else r.get(c) for c in _CSV_COLUMNS])
    figs = _figures(rows, cases)
    for name, data in figs.items():
        (out / name).write_bytes(data)
    img = {k: base64.b64encode(v).decode("ascii") for k, v in figs.items()}
    esc = html.escape
    rank_rows_html = "".join(
        f"<tr><td>{g['rank']}</td><td>{esc(g['method'])}</td><td>{esc(g['params_label'])}</td>"
        f"<td>{'yes' if g['phase_biased'] else 'no'}</td><td>{g['recall']:.4f}</td><td>{g['delta_ppc_phase']:.1e}</td>"
        f"<td>{g['phase_recall_dip']:.3f}</td><td>{g['residual']:.3g}</td><td>{g['seconds']:.2f}</td></tr>"
        for g in ranking)
    cols = ["scenario", "seed", "method", "params_label", "recall", "precision", "phase_recall_dip", "delta_ppc_phase",
            "phase_biased", "plv_error_phase", "preferred_phase_error_deg", "waveform_correlation",
            "spikeband_residual", "lfp_band_ratio", "lfp_error_away", "harmonic_excess", "seconds"]

    def fmt(v):
        if isinstance(v, float):
            return f"{v:.4g}"
        return esc(str(v))

    all_rows_html = "".join("<tr>" + "".join(f"<td>{fmt(r.get(c))}</td>" for c in cols) + "</tr>" for r in clean_rows)
    rec_txt = ("no method evaluated" if best is None else
               f"<b>{esc(best['method'])}</b> with parameters <code>{esc(json.dumps(best['params']) if best['params'] else 'default')}</code>"
               + (" &mdash; note: every method is phase-biased on these data; read the figures before sorting" if best["phase_biased"] else ""))
    page = f"""<!DOCTYPE html>
<html><head><meta charset="utf-8"><title>{esc(title)}</title>
<style>body{{font-family:sans-serif;max-width:1100px;margin:2em auto;}} table{{border-collapse:collapse;font-size:12px}}
td,th{{border:1px solid #ccc;padding:2px 6px;text-align:right}} img{{max-width:100%}}</style></head><body>
<h1>{esc(title)}</h1>
<p>artifactclean {esc(__version__)}, {esc(summary['created'])}. {esc(command)}</p>
<h2>Recommendation</h2><p>{rec_txt}</p>
<p>Ranking rule: {esc(RANKING_RULE)}. A method is phase-biased when its change of PPC or the dip of its
detection efficiency across the stimulation cycle exceeds the noise floor reported beside it.</p>
<table><tr><th>rank</th><th>method</th><th>parameters</th><th>phase-biased</th><th>recall</th><th>max |delta PPC|</th>
<th>max phase dip</th><th>residual</th><th>seconds</th></tr>{rank_rows_html}</table>
<h2>Detection efficiency against stimulation phase</h2><img src="data:image/png;base64,{img['efficiency.png']}">
<h2>Ranking</h2><img src="data:image/png;base64,{img['ranking.png']}">
<h2>Spectra after cleaning</h2><img src="data:image/png;base64,{img['spectra.png']}">
<h2>Injected and recovered spikes</h2><img src="data:image/png;base64,{img['waveforms.png']}">
<h2>All rows</h2><table><tr>{''.join(f'<th>{c}</th>' for c in cols)}</tr>{all_rows_html}</table>
<p>Stimulation of people follows approved protocols, safety guidelines and local ethics approval. These figures
describe what cleaning does to injected spikes on these data; they are evidence to weigh, not a conclusion.</p>
</body></html>"""
    (out / "report.html").write_text(page)
    return summary
