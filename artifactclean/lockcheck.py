"""``artifactclean lockcheck``: phase locking of sorted units, tested against residue.

Reads a spike table and the raw recording, fits the stimulation model,
measures the detection efficiency against stimulation phase on the same
recording (known spikes injected into the raw data, cleaned with the chosen
method, detected), and writes per unit and condition the locking statistics
of :func:`artifactclean.entrainment.lock_table`:

* ``DIR/lockcheck.json``: ``{"units": [...], "comparisons": [...], "efficiency": {...}, ...}``
* ``DIR/lockcheck.csv``: the unit rows;
* ``DIR/phase_histograms.png``, ``DIR/ppc_stim_vs_sham.png``, ``DIR/efficiency.png``.
"""

from __future__ import annotations

import csv
import json
from pathlib import Path

import numpy as np

from .entrainment import lock_table
from .estimators import make_estimator
from .injection import cleaned_noise, detection_efficiency, inject_spikes
from .jsonsafe import plain
from .stimulation import StimulationModel

__all__ = ["OUTPUT_NAMES", "check_out_dir", "lfp_spike_phases", "read_efficiency", "read_stim_table", "read_spike_table", "measure_efficiency", "run_lockcheck", "write_lockcheck"]


#: files lockcheck writes into its output directory
OUTPUT_NAMES = ("lockcheck.json", "lockcheck.csv", "phase_histograms.png", "ppc_stim_vs_sham.png", "efficiency.png")


def check_out_dir(out: Path, force: bool) -> None:
    """Refuse an output directory that already holds lockcheck outputs, unless ``force``."""
    out = Path(out)
    there = [n for n in OUTPUT_NAMES if (out / n).exists()]
    if there and not force:
        raise ValueError(f"{out} already holds {', '.join(there)}; pass --force to overwrite")
    if out.exists() and not out.is_dir():
        raise ValueError(f"{out} exists and is not a directory")


def read_spike_table(path) -> tuple[np.ndarray, np.ndarray]:
    """Spike times (s) and unit labels from CSV (``time_s,unit``), NPZ (``times``, ``units``) or NIX.

    NIX files are read with ``neo.io.NixIO``: every SpikeTrain is one unit
    (its ``unit`` annotation, else its name, else its index).
    """
    path = Path(path)
    if not path.exists():
        raise ValueError(f"spike table {path} does not exist")
    suffix = path.suffix.lower()
    if suffix == ".csv":
        with open(path, newline="") as fh:
            rows = list(csv.DictReader(fh))
        if not rows:
            raise ValueError(f"spike table {path} holds no spikes (a header and no rows, or empty)")
        cols = {c.strip().lower(): c for c in rows[0]}
        if "time_s" not in cols or "unit" not in cols:
            raise ValueError(f"spike table {path} needs columns 'time_s' and 'unit'; it has {list(rows[0])}")
        try:
            times = np.array([float(r[cols["time_s"]]) for r in rows])
        except ValueError as err:
            raise ValueError(f"spike table {path}: a time_s value is not a number ({err})") from None
        units = np.array([r[cols["unit"]].strip() for r in rows])
    elif suffix == ".npz":
        with np.load(path, allow_pickle=False) as z:
            tk = next((k for k in ("time_s", "times") if k in z), None)
            uk = next((k for k in ("unit", "units") if k in z), None)
            if tk is None or uk is None:
                raise ValueError(f"{path} needs arrays 'times' (s) and 'units'; it has {sorted(z.files)}")
            times, units = np.asarray(z[tk], dtype=np.float64), np.asarray(z[uk]).astype(str)
    elif suffix in (".nix", ".h5"):
        import neo
        import quantities as pq

        io = neo.io.NixIO(str(path), mode="ro")
        try:
            blocks = io.read_all_blocks()
        finally:
            io.close()
        t, u = [], []
        k = 0
        for blk in blocks:
            for seg in blk.segments:
                for st in seg.spiketrains:
                    label = st.annotations.get("unit", st.name or str(k))
                    t.append(st.rescale(pq.s).magnitude.ravel())
                    u.append(np.full(len(st), str(label)))
                    k += 1
        if not t:
            raise ValueError(f"{path} holds no SpikeTrain")
        times, units = np.concatenate(t), np.concatenate(u)
    else:
        raise ValueError(f"unsupported spike table {path.suffix!r}: use .csv (time_s,unit), .npz or .nix")
    if times.size == 0:
        raise ValueError(f"spike table {path} holds no spikes")
    if not np.all(np.isfinite(times)):
        raise ValueError(f"spike table {path} holds non-finite times")
    return times, units


def read_stim_table(path, *, fs: float = 30000.0, duration_s: float | None = None) -> StimulationModel:
    """A stimulation model from a table of blocks, for spike tables without a recording.

    CSV columns ``kind`` (active or sham), ``start_s``, ``stop_s``, ``freq_hz`` and optionally
    ``phase_deg`` (the stimulation phase at ``start_s``, default 0; 0 = positive peak of the
    fundamental) and ``amplitude`` (for levels). ``duration_s`` defaults to the last block's end.
    """
    from .stimulation import StimBlock

    path = Path(path)
    if not path.exists():
        raise ValueError(f"stimulation table {path} does not exist")
    with open(path, newline="") as fh:
        rows = list(csv.DictReader(fh))
    need = {"kind", "start_s", "stop_s", "freq_hz"}
    if not rows or not need <= set(rows[0]):
        raise ValueError(f"stimulation table {path} needs columns {sorted(need)}; it has "
                         f"{list(rows[0]) if rows else 'no rows'}")
    blocks = []
    for i, r in enumerate(rows):
        try:
            a, b, f = float(r["start_s"]), float(r["stop_s"]), float(r["freq_hz"])
            ph = np.radians(float(r.get("phase_deg") or 0.0))
            amp = float(r.get("amplitude") or 1.0)
        except ValueError as err:
            raise ValueError(f"stimulation table {path}, row {i + 2}: {err}") from None
        kind = r["kind"].strip().lower()
        if kind not in ("active", "sham"):
            raise ValueError(f"stimulation table {path}, row {i + 2}: kind must be active or sham, got {r['kind']!r}")
        if not (b > a >= 0 and 0 < f < fs / 2):
            raise ValueError(f"stimulation table {path}, row {i + 2}: need 0 <= start_s < stop_s and 0 < freq_hz < fs/2")
        s0, s1 = int(round(a * fs)), int(round(b * fs))
        blocks.append(StimBlock(kind, s0, s1, s0, s1, f, float(np.mod(ph, 2 * np.pi)), s0, amp))
    blocks.sort(key=lambda x: x.start)
    n = int(round((duration_s if duration_s is not None else max(x.stop for x in blocks) / fs) * fs))
    return StimulationModel(fs=fs, n_samples=max(n, max(x.stop for x in blocks)), blocks=blocks, reference="table")


def read_efficiency(path) -> dict:
    """A detection efficiency profile from CSV ``phase_deg,recall`` (bins of equal width from 0)."""
    with open(path, newline="") as fh:
        rows = list(csv.DictReader(fh))
    if not rows or not {"phase_deg", "recall"} <= set(rows[0]):
        raise ValueError(f"efficiency table {path} needs columns phase_deg, recall")
    recall = [float(r["recall"]) for r in rows]
    k = len(recall)
    return dict(bin_edges_deg=np.linspace(0, 360, k + 1).tolist(), recall=recall, n=None, recall_overall=None,
                method="supplied", injected=0, source=str(path))


def lfp_spike_phases(rec, channel: int, times_s, band: tuple[float, float]) -> np.ndarray:
    """Phase (rad) of an LFP band at each spike, from a cleaned recording read in chunks.

    The channel is decimated to about 1 kHz (the chunked polyphase routine the
    stimulation fit uses), band-passed and turned into an analytic signal
    (:func:`artifactclean.entrainment.lfp_phase`); the unwrapped phase is
    interpolated at the spike times. 0 is the band's positive peak.
    """
    from .entrainment import lfp_phase
    from .stimulation import decimate_reader

    lo, hi = band
    target = max(4.0 * hi, 250.0)
    x, fs_d = decimate_reader(lambda a, b: rec.read(a, b, [channel])[0], rec.n_samples, rec.fs, target)
    ph = np.unwrap(lfp_phase(x, fs_d, band))
    t = np.arange(x.size) / fs_d
    return np.mod(np.interp(np.asarray(times_s, dtype=np.float64), t, ph), 2 * np.pi)


def measure_efficiency(data: np.ndarray, fs: float, model: StimulationModel, *, method: str = "template",
                       amplitude: float = 6.0, rate_hz: float = 30.0, n_bins: int = 12, seed: int = 0) -> dict:
    """Detection efficiency against stimulation phase of ``data`` (raw), by injection, cleaning and detection."""
    # amplitudes refer to the noise of the cleaned data (the raw spike band is inflated by the artifact)
    base = make_estimator(method)
    clean0 = base.fit_transform(data, fs=fs, stim_model=model)
    sigma = cleaned_noise(clean0, base.lost_, fs)
    hybrid, truth = inject_spikes(data, fs, phase=model.phase(), rate_hz=rate_hz, amplitude=amplitude,
                                  noise_uv=sigma, avoid_in=clean0, seed=seed)
    est = make_estimator(method)
    cleaned = est.fit_transform(hybrid, fs=fs, stim_model=model)
    eff = detection_efficiency(truth, cleaned, fs, lost=est.lost_, n_bins=n_bins)
    eff.update(method=method, amplitude_noise=amplitude, injected=int(truth.samples.size), seed=seed)
    return eff


def run_lockcheck(times_s, units, model: StimulationModel, *, efficiency: dict | None = None, alpha: float = 0.05,
                  equivalence=None, n_perm: int = 1000, phases=None, seed: int = 0) -> dict:
    """Locking statistics (see :func:`artifactclean.entrainment.lock_table`) from spike times in seconds."""
    times_s = np.asarray(times_s, dtype=np.float64)
    samples = np.round(times_s * model.fs).astype(np.int64)
    eff = None if efficiency is None else np.asarray(efficiency["recall"], dtype=np.float64)
    res = lock_table(samples, units, model, efficiency=eff, alpha=alpha, n_perm=n_perm, equivalence=equivalence,
                     phases=phases, seed=seed)
    res["efficiency"] = efficiency
    res["stimulation"] = model.to_dict()
    return res


def write_lockcheck(out: Path, res: dict, times_s, units, model: StimulationModel, *, phases=None,
                    force: bool = False) -> list:
    """Write ``lockcheck.json``, ``lockcheck.csv`` and the figures into ``out``; return the paths."""
    from .plotting import _plt

    out = Path(out)
    check_out_dir(out, force)
    out.mkdir(parents=True, exist_ok=True)
    paths = []
    with open(out / "lockcheck.json", "w") as fh:
        json.dump(plain(res), fh, indent=2)
    paths.append(out / "lockcheck.json")
    cols = ["unit", "condition", "n_spikes", "duration_s", "rate_hz", "plv", "ppc", "ppc_across_blocks",
            "preferred_phase_deg", "rayleigh_z", "p_value", "p_value_residue", "q_value_residue", "locked",
            "flagged_residue"]
    with open(out / "lockcheck.csv", "w", newline="") as fh:
        w = csv.writer(fh)
        w.writerow(cols)
        for r in res["units"]:
            w.writerow([r[c] for c in cols])
    paths.append(out / "lockcheck.csv")
    plt = _plt()
    # phase histograms: one row per unit, one column per condition
    conds = sorted({r["condition"] for r in res["units"]})
    ulist = list(dict.fromkeys(r["unit"] for r in res["units"]))
    samples = np.round(np.asarray(times_s) * model.fs).astype(np.int64)
    from .entrainment import spike_phases

    ph, cond, _ = spike_phases(samples, model)
    if phases is not None:
        ph = np.asarray(phases, dtype=np.float64)
    units = np.asarray(units)
    fig, axes = plt.subplots(len(ulist), len(conds), figsize=(2.6 * len(conds) + 1, 1.9 * len(ulist) + 0.6),
                             squeeze=False, sharex=True)
    edges = np.linspace(0, 360, 19)
    for i, u in enumerate(ulist):
        for j, c in enumerate(conds):
            ax = axes[i, j]
            sel = (units.astype(str) == str(u)) & (cond == c)
            ax.hist(np.degrees(ph[sel]), bins=edges, color="tab:blue" if c.startswith("stim") else "0.5")
            row = next(r for r in res["units"] if str(r["unit"]) == str(u) and r["condition"] == c)
            tag = "locked" if row["locked"] else ("residue?" if row["flagged_residue"] else "")
            ax.set_title(f"unit {u}, {c}\nPPC {row['ppc']:.3f} {tag}", fontsize=8)
            ax.set_xticks([0, 90, 180, 270, 360])
    for ax in axes[-1]:
        ax.set_xlabel("stimulation phase (deg)" if phases is None else "LFP phase (deg)")
    fig.tight_layout()
    fig.savefig(out / "phase_histograms.png", dpi=100)
    plt.close(fig)
    paths.append(out / "phase_histograms.png")
    # PPC stimulation vs sham per unit
    fig, ax = plt.subplots(figsize=(max(4, 0.8 * len(ulist) + 2), 3.5))
    width = 0.8 / max(len(conds), 1)
    for j, c in enumerate(conds):
        vals = [next((r["ppc"] for r in res["units"] if r["unit"] == u and r["condition"] == c), np.nan) for u in ulist]
        ax.bar(np.arange(len(ulist)) + j * width, vals, width, label=c)
    ax.axhline(0, color="k", lw=0.6)
    ax.set_xticks(np.arange(len(ulist)) + 0.4 - width / 2)
    ax.set_xticklabels([str(u) for u in ulist])
    ax.set_xlabel("unit")
    ax.set_ylabel("PPC")
    ax.legend(fontsize=8)
    ax.set_title("phase locking per condition")
    fig.tight_layout()
    fig.savefig(out / "ppc_stim_vs_sham.png", dpi=100)
    plt.close(fig)
    paths.append(out / "ppc_stim_vs_sham.png")
    fig, ax = plt.subplots(figsize=(5, 3.2))
    eff = res.get("efficiency")
    if eff:
        e = np.asarray(eff["bin_edges_deg"])
        ax.step(e, np.r_[eff["recall"], eff["recall"][-1]], where="post")
        ax.set_ylim(0, 1.05)
        ax.set_title(f"detection efficiency ({eff['method']}, {eff['injected']} injected)" if eff["injected"]
                     else f"detection efficiency (supplied: {Path(eff.get('source', '')).name})", fontsize=9)
    else:
        ax.set_title("detection efficiency not measured (flat null)", fontsize=9)
    ax.set_xlabel("stimulation phase (deg)")
    ax.set_ylabel("recall")
    fig.tight_layout()
    fig.savefig(out / "efficiency.png", dpi=100)
    plt.close(fig)
    paths.append(out / "efficiency.png")
    return paths
