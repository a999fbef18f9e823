"""Workers: groups of channels cleaned apart give exactly the single-run result."""

import json
import warnings

import numpy as np
import pytest

from artifactclean import METHODS, clean
from artifactclean.parallel import channel_groups, check_workers, clean_in_groups
from artifactclean import TemplateSubtraction
from artifactclean.estimators.cycles import array_reader


@pytest.fixture(scope="module")
def short_dac(rec10_dac):
    return rec10_dac.data[:, : int(6 * rec10_dac.fs)], rec10_dac.fs


@pytest.mark.parametrize("method", sorted(METHODS))
def test_two_workers_equal_one(method, short_dac):
    x, fs = short_dac
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        one = clean(x, fs, method=method)
        two = clean(x, fs, method=method, workers=2)
    # channels are independent once model and plans are fixed: the same additions in the same order
    np.testing.assert_array_equal(one, two)


def test_block_plans_do_not_depend_on_the_workers(mod20_dac):
    """A block plan spreads its DAC search, its groups of channels and the heartbeat's rows over the
    workers it is given: the plan is the serial one to the bit (pickled bytes), with a DAC grid, a pulse
    model whose track pools every channel, and a phase response in it."""
    import pickle
    from concurrent.futures import ThreadPoolExecutor

    from artifactclean.estimators.base import _fit_model

    x, fs = mod20_dac.data, mod20_dac.fs
    model = _fit_model(x, fs, None, None)
    plans = []
    with warnings.catch_warnings(), ThreadPoolExecutor(3) as pool:
        warnings.simplefilter("ignore")
        for mapper in (map, pool.map):
            est = TemplateSubtraction()
            est.prepare(array_reader(x), model, fs, mapper=mapper)
            plans.append(est._plans)
    (serial,), (threaded,) = (p.values() for p in plans)
    assert serial.grid is not None and serial.response.phase is not None
    assert serial.response.pulse is not None and len(serial.response.pulse.pooled()) > 1
    assert pickle.dumps(serial) == pickle.dumps(threaded)


def test_groups_see_the_reference_channel_they_need(short_dac):
    """With a DAC grid the template settles tick edges on the plan's reference channel: a group
    without it fits on it too, and drops it."""
    x, fs = short_dac
    est = TemplateSubtraction()
    from artifactclean.estimators.base import _fit_model

    model = _fit_model(x, fs, None, None)
    est.prepare(array_reader(x), model, fs)
    (ref, grid, *_), = est._plans.values()
    assert grid is not None
    others = [c for c in range(x.shape[0]) if c != ref]
    sub, fit = est.for_channels(others[:1])
    assert fit == [others[0], ref]
    plan, = sub._plans.values()
    assert plan.ref == 1 and plan.response.response.shape[0] == 2
    np.testing.assert_array_equal(plan.response.response[1], est._plans[next(iter(est._plans))].response.response[ref])


def test_groups_of_a_clipped_session_see_the_channels_that_judge_the_dacs_edges():
    """Where a channel clips, the samples next to a DAC's tick edges are judged on the strongest
    channels at once (cycles.settle_edges), the plan's reference first: a group fits on all of them,
    so that it settles the edges as the whole array does."""
    from artifactclean.estimators.base import _fit_model
    from artifactclean.scenarios import make_scenario

    rec = make_scenario("clipped_20hz_dac", seed=3, duration_s=6)
    est = TemplateSubtraction()
    est.prepare(array_reader(rec.data), _fit_model(rec.data, rec.fs, None, None), rec.fs)
    plan, = est._plans.values()
    assert plan.grid is not None and plan.judges[0] == plan.ref and len(plan.judges) == 4
    strength = np.std(rec.data, axis=1)
    assert sorted(plan.judges[1:], key=lambda c: -strength[c]) == list(plan.judges[1:])
    other = next(c for c in range(4) if c != plan.ref)
    sub, fit = est.for_channels([other])
    assert fit[0] == other and sorted(fit) == [0, 1, 2, 3]
    sub_plan, = sub._plans.values()
    assert [fit[j] for j in sub_plan.judges] == list(plan.judges)


@pytest.mark.parametrize("case", ["clipped_20hz_dac", "free_13p37"])
def test_a_channel_cleaned_with_the_judges_keys_equals_it_cleaned_beside_the_judges(case):
    """The judges (a DAC's reference, and the strongest channels where some clip) settle the samples beside the
    tick edges; fitted once on their own (edge_keys_task's way), their keys let every other channel be cleaned
    alone with the bits it gets beside them. With the grid's keys unsettled a channel comes out otherwise."""
    from artifactclean.estimators.base import _fit_model
    from artifactclean.scenarios import make_scenario
    from artifactclean.synthetic import ArtifactSpec, BlockSpec, simulate_recording

    if case == "clipped_20hz_dac":
        rec = make_scenario("clipped_20hz_dac", seed=3, duration_s=6)
    else:  # a DAC not locked to the cycle: samples are binned at the phase their tick held
        rec = simulate_recording(8.0, artifact=ArtifactSpec(freq_hz=13.37, dac_rate_hz=1000.0, drift_ppm=40.0,
                                                            channel_gains=(1.0, -0.6, 0.8)),
                                 blocks=[BlockSpec(0.5, 7.0, ramp_s=0.5)], seed=8, n_channels=3)
    x, fs = rec.data, rec.fs
    model = _fit_model(x, fs, None, None)
    est = TemplateSubtraction()
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        est.prepare(array_reader(x), model, fs)
        blk = model.blocks[0]
        judges = est.edge_judges(blk)
        assert judges and judges[0] == est._plans[next(iter(est._plans))].ref
        assert len(judges) == (4 if case == "clipped_20hz_dac" else 1)
        sub, fit = est.for_channels(judges)
        sub._record_edges = True
        sub.fit(x[fit], fs=fs, stim_model=model)
        (passes,) = sub.edge_keys_.values()
        assert len(passes) == 2 and all(idx.size > 0 for idx, _ in passes)  # the judges moved some samples
        for ch in range(x.shape[0]):
            joint, fit = est.for_channels([ch])
            want = joint.fit_transform(x[fit], fs=fs, stim_model=model)[:1]
            alone, fit = est.for_channels([ch], shared_edges=True)
            assert fit == [ch]
            alone._edge_keys = sub.edge_keys_
            np.testing.assert_array_equal(alone.fit_transform(x[fit], fs=fs, stim_model=model), want)
            np.testing.assert_array_equal(alone.lost_, joint.lost_[:1])
        unsettled = {k: [(idx[:0], val[:0]) for idx, val in v] for k, v in sub.edge_keys_.items()}
        alone, fit = est.for_channels([ch], shared_edges=True)
        alone._edge_keys = unsettled
        assert not np.array_equal(alone.fit_transform(x[fit], fs=fs, stim_model=model), want)
        alone, fit = est.for_channels([ch], shared_edges=True)
        with pytest.raises(RuntimeError, match="judges' keys"):
            alone.fit(x[fit], fs=fs, stim_model=model)


def test_clipped_and_blanked_samples_equal_with_workers(rng):
    from artifactclean.scenarios import make_scenario

    rec = make_scenario("clipped_20hz_dac", seed=3, duration_s=6)
    x = rec.data.copy()
    x[2, 1000:1010] = np.nan
    est = TemplateSubtraction()
    one = est.fit_transform(x, fs=rec.fs, nan_policy="blank")
    two, lost, reports = clean_in_groups(TemplateSubtraction(), x, rec.fs, workers=3, nan_policy="blank")
    np.testing.assert_array_equal(one, two)
    np.testing.assert_array_equal(est.lost_, lost)
    assert lost[2, 1000:1010].all() and len(reports) == 3
    assert [r["channels"] for r in reports] == channel_groups(4, 3)


def test_worker_counts():
    assert channel_groups(5, 2) == [[0, 1], [2, 3, 4]] or channel_groups(5, 2) == [[0, 1, 2], [3, 4]]
    assert channel_groups(2, 8) == [[0], [1]]
    assert sum(map(len, channel_groups(384, 7))) == 384
    assert check_workers(3) == 3 and check_workers(0) >= 1
    for bad in (-1, 1.5, "2", True):
        with pytest.raises(ValueError, match="workers"):
            check_workers(bad)
    with pytest.raises(ValueError, match="workers"):
        clean(np.zeros((2, 1000)), 1000.0, workers=-2)


# ---------------------------------------------------------------- files
@pytest.fixture(scope="module")
def oe_file(tmp_path_factory):
    from artifactclean.demo_files import write_openephys_binary
    from artifactclean.synthetic import ArtifactSpec, BlockSpec, NeuralSpec, simulate_recording

    from conftest import units4

    rec = simulate_recording(16.0, artifact=ArtifactSpec(freq_hz=20.0, dac_rate_hz=1000.0, drift_ppm=20.0),
                             neural=NeuralSpec(units=units4()), blocks=[BlockSpec(1.0, 15.0, ramp_s=1.0)], seed=5)
    return write_openephys_binary(tmp_path_factory.mktemp("oe") / "session", rec.data, rec.fs)


def _clean_file(root, out, **kw):
    from artifactclean.io import open_recording
    from artifactclean.io.pipeline import clean_recording

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        # a 1 s budget (for 4 channels): the block is cleaned in several pieces, some of them at once
        summary = clean_recording(open_recording(root), out, max_range_s=1.0, chunk_s=1.0, **kw)
    return out.read_bytes(), summary


def test_file_cleaned_by_two_workers_is_the_same_file(oe_file, tmp_path):
    one, s1 = _clean_file(oe_file, tmp_path / "one.dat")
    two, s2 = _clean_file(oe_file, tmp_path / "two.dat", workers=2)
    three, _ = _clean_file(oe_file, tmp_path / "three.dat", workers=3)
    assert one == two == three
    assert s1["clipped_stretches"] == s2["clipped_stretches"]
    side = json.loads((tmp_path / "two.json").read_text())
    prov = side["provenance"]
    # a 1 s budget (for 4 channels) is shorter than four contexts: one channel per task
    assert prov["workers"] == 2 and prov["channel_groups"] == [["CH1"], ["CH2"], ["CH3"], ["CH4"]]
    assert len({r["start_s"] for r in prov["estimator_report"]}) > 2  # several pieces in time
    assert {tuple(r["channels"]) for r in prov["estimator_report"]} == {("CH1",), ("CH2",), ("CH3",), ("CH4",)}


@pytest.mark.parametrize("case", ["reference", "clipped"])
def test_a_files_judges_are_fitted_once_a_piece(case, oe_file, tmp_path, monkeypatch):
    """One channel a task with a DAC grid: the judges' keys (the reference's; where channels clip, the four
    strongest's) are settled by one task per piece and handed to every group's task, which give the file the
    bytes of tasks that each fit the judges beside their channel (edge_judges empty: the tasks before; the
    groups and pieces held as they were, since the judges count in a task's memory)."""
    import artifactclean.io.pipeline as pipe

    if case == "clipped":
        from artifactclean.demo_files import write_openephys_binary
        from artifactclean.scenarios import make_scenario

        rec = make_scenario("clipped_20hz_dac", seed=3, duration_s=12)
        oe_file = write_openephys_binary(tmp_path / "clipped", rec.data, rec.fs)
    calls, shapes = [], {}
    task, shape = pipe.edge_keys_task, pipe._task_shape
    monkeypatch.setattr(pipe, "edge_keys_task", lambda *a: calls.append((a[2:4], len(a[1]))) or task(*a))
    monkeypatch.setattr(pipe, "_task_shape", lambda *a: shapes.setdefault(a[:3], shape(*a)))
    shared, _ = _clean_file(oe_file, tmp_path / "shared.dat", workers=2)
    prov = json.loads((tmp_path / "shared.json").read_text())["provenance"]
    pieces = sorted({(r["start_s"], r["stop_s"]) for r in prov["estimator_report"]})
    assert len(calls) == len(pieces) > 2 and len({c for c, _ in calls}) == len(calls)
    assert {n for _, n in calls} == {4 if case == "clipped" else 1}
    monkeypatch.setattr(TemplateSubtraction, "edge_judges", lambda self, blk: [])
    calls.clear()
    joint, _ = _clean_file(oe_file, tmp_path / "joint.dat", workers=2)
    assert not calls and joint == shared


def test_file_cleaned_on_a_dask_cluster_is_the_same_file(oe_file, tmp_path):
    distributed = pytest.importorskip("dask.distributed")
    one, _ = _clean_file(oe_file, tmp_path / "local.dat")
    # worker processes: each task opens the file by path, as on a lab's cluster
    with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True, dashboard_address=None) as lc, \
            distributed.Client(lc) as client:
        remote, summary = _clean_file(oe_file, tmp_path / "dask.dat", cluster=client)
    assert remote == one
    prov = json.loads((tmp_path / "dask.json").read_text())["provenance"]
    assert prov["workers"] == 2 and prov["cluster"].startswith("tcp://")


def test_cluster_needs_a_file_not_an_array(tmp_path):
    distributed = pytest.importorskip("dask.distributed")
    from artifactclean.io import open_recording
    from artifactclean.io.pipeline import clean_recording

    with distributed.LocalCluster(n_workers=1, processes=False, dashboard_address=None) as lc, \
            distributed.Client(lc) as client:
        with pytest.raises(TypeError, match="by path"):
            clean_recording(open_recording(np.zeros((2, 30000)), fs=30000.0), tmp_path / "x.dat", cluster=client)
    assert not (tmp_path / "x.dat").exists()
    with pytest.raises(TypeError, match="cluster"):
        clean_recording(open_recording(np.zeros((2, 30000)), fs=30000.0), tmp_path / "x.dat", cluster=3)


def _pieces_and_whole(rec, path, method=None, **kwargs):
    """``rec`` cleaned as a file in pieces of time (written as float32 NIX) and as one array:
    the file's provenance, its samples (n_channels, n) and the array's result."""
    from neo.io import NixIO

    from artifactclean.io import open_recording
    from artifactclean.io.pipeline import clean_recording

    extra = {} if method is None else dict(method=method)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        clean_recording(open_recording(rec.data, fs=rec.fs), path, **extra, **kwargs)
        whole = clean(rec.data, rec.fs, **extra)
    with NixIO(str(path), "ro") as io:
        blk = io.read_block()
    y = np.asarray(blk.segments[0].analogsignals[0].magnitude, dtype=float).T
    return json.loads(blk.annotations["provenance"]), y, whole


@pytest.mark.parametrize("method", ["template", "adaptive", "comb", "regression", "pca"])
def test_file_pieces_equal_the_whole_array(method, tmp_path):
    """Pieces with each estimator's declared context give the whole-array result: written as
    float32 NIX, within 1e-6 of the data's range (float32 itself holds 6e-8). Regression and PCA
    make their choices once per block, here (a 54 s block) on the middle of its plateau: while they
    chose per piece, pieces differed by 3.7e-3 (27 uV) and 4.1e-2 (294 uV) of the range."""
    from artifactclean.synthetic import ArtifactSpec, BlockSpec, simulate_recording

    # a 54 s block: longer than one piece with the template's context (13 s at 20 Hz with the
    # heartbeat's harmonics modelled; a piece holds four contexts)
    rec = simulate_recording(56.0, artifact=ArtifactSpec(freq_hz=20.0, dac_rate_hz=1000.0, heart_depth=0.02,
                                                         resp_depth=0.01, drift_ppm=40.0, clip_uv=3600.0),
                             blocks=[BlockSpec(1.0, 54.0, ramp_s=1.0)], seed=6)
    prov, y, whole = _pieces_and_whole(rec, tmp_path / "y.nix", method=method, max_range_s=9.0, workers=2)
    assert len({r["start_s"] for r in prov["estimator_report"]}) >= 2  # cleaned in pieces of time
    assert np.abs(y - whole).max() <= 1e-6 * np.ptp(rec.data)


def test_pieces_that_start_inside_a_long_ramp_equal_the_whole_array(tmp_path):
    """10 s ramps (common in tACS protocols) are longer than a piece: a piece that reads part of one
    must still see the block's ramp, not the part it holds (1.4 uV next to the ramp before)."""
    from artifactclean.synthetic import ArtifactSpec, BlockSpec, simulate_recording

    rec = simulate_recording(60.0, artifact=ArtifactSpec(freq_hz=20.0, heart_depth=0.02, resp_depth=0.01, drift_ppm=40.0),
                             blocks=[BlockSpec(1.0, 58.0, ramp_s=10.0)], seed=6)
    prov, y, whole = _pieces_and_whole(rec, tmp_path / "y.nix", max_range_s=6.0)
    starts = sorted({r["start_s"] for r in prov["estimator_report"]})
    # a piece boundary within a context (~15 s with the heartbeat's harmonics modelled) of a ramp
    # (1-11 s and 49-59 s): one piece reads part of that ramp only
    assert any(1.0 < a < 26.0 or 34.0 < a < 59.0 for a in starts[1:]), starts
    assert np.abs(y - whole).max() <= 1e-6 * np.ptp(rec.data)


@pytest.mark.parametrize("method", ["template", "regression"])
def test_pieces_of_a_block_cleaned_upsampled_equal_the_whole_array(method, tmp_path):
    """40 Hz from 1 kHz is cleaned on a copy upsampled 9x (resampling.py): the plans read the upsampled
    stretch through the file's reader, the pieces upsample their own arrays. With clipped channels the
    interpolation rings past the rails: held there in both, or the plans differed (1.7e-2 of the range)."""
    from artifactclean.synthetic import ArtifactSpec, BlockSpec, simulate_recording

    rec = simulate_recording(60.0, fs=1000.0, artifact=ArtifactSpec(freq_hz=40.0, heart_depth=0.02, resp_depth=0.01,
                                                                    drift_ppm=40.0, clip_uv=3600.0),
                             blocks=[BlockSpec(1.0, 58.0, ramp_s=1.0)], seed=6)
    prov, y, whole = _pieces_and_whole(rec, tmp_path / "y.nix", method=method, max_range_s=9.0, workers=2)
    assert len({r["start_s"] for r in prov["estimator_report"]}) >= 2
    assert prov["estimator_report"][0]["blocks"][0]["upsampled_by"] > 1
    assert rec.clipped.any()
    assert np.abs(y - whole).max() <= 1e-6 * np.ptp(rec.data)


def test_a_cluster_running_another_version_is_refused(oe_file, tmp_path, monkeypatch):
    distributed = pytest.importorskip("dask.distributed")
    import artifactclean.parallel as par

    with distributed.LocalCluster(n_workers=1, processes=False, dashboard_address=None) as lc, \
            distributed.Client(lc) as client:
        # in-process workers share this module: make them report another version
        monkeypatch.setattr(par, "_installed_version", lambda: "0.0.1")
        with pytest.raises(par.ClusterError, match="0.0.1"):
            _clean_file(oe_file, tmp_path / "v.dat", cluster=client)
    assert not list(tmp_path.glob("*.dat")) and not list(tmp_path.glob(".*partial*"))


@pytest.mark.parametrize("freq", [13.0, 13.37])
def test_pieces_with_a_dac_that_is_not_locked_to_the_cycle_equal_the_whole_array(freq, tmp_path):
    """13 Hz from a 1 kHz DAC: the template's rows are periods of 13 cycles (1 s); 13.37 Hz: it reads
    each tick's held phase. The ticks are found once per block (prepare), so every piece models the
    same ticks."""
    from artifactclean.synthetic import ArtifactSpec, BlockSpec, simulate_recording

    rec = simulate_recording(100.0, artifact=ArtifactSpec(freq_hz=freq, dac_rate_hz=1000.0, drift_ppm=40.0,
                                                          channel_gains=(1.0, -0.6)),
                             blocks=[BlockSpec(1.0, 98.0, ramp_s=1.0)], seed=8, n_channels=2)
    # rows of 13 cycles need 20 s of context: 27 s of 4 channels' memory holds a channel, the reference
    # and pieces of four contexts (9 s cut the context to 7 s, and pieces differed by 0.016 uV)
    prov, y, whole = _pieces_and_whole(rec, tmp_path / "y.nix", max_range_s=27.0)
    assert len({r["start_s"] for r in prov["estimator_report"]}) >= 2  # cleaned in pieces of time
    info = prov["estimator_report"][0]["blocks"][0]
    assert info["dac_free_running"] if freq == 13.37 else info["dac_cycles_per_period"] == 13
    assert np.abs(y - whole).max() <= 1e-6 * np.ptp(rec.data)


def test_pieces_with_a_dac_behind_the_amplifiers_lowpass_equal_the_whole_array(tmp_path):
    """The DAC steps' response and the grid's drift are learned once per block (prepare), on the plan's
    stretch: every piece adds the same response beside its tick levels."""
    from artifactclean.synthetic import ArtifactSpec, BlockSpec, simulate_recording

    rec = simulate_recording(40.0, artifact=ArtifactSpec(freq_hz=20.0, dac_rate_hz=1000.0, lowpass_hz=7500.0,
                                                         drift_ppm=40.0, channel_gains=(1.0, -0.6)),
                             blocks=[BlockSpec(1.0, 38.0, ramp_s=1.0)], seed=8, n_channels=2)
    prov, y, whole = _pieces_and_whole(rec, tmp_path / "y.nix", max_range_s=9.0)
    assert len({r["start_s"] for r in prov["estimator_report"]}) >= 2
    assert all(r["blocks"][0]["dac_step_response"] for r in prov["estimator_report"])
    assert np.abs(y - whole).max() <= 1e-6 * np.ptp(rec.data)


def test_pieces_with_a_phase_shifting_heartbeat_equal_the_whole_array(tmp_path):
    """The phase shift is planned once per block and fitted per segment on high-passed data: pieces
    read the context their filters need and give the whole array's result."""
    from artifactclean.synthetic import ArtifactSpec, BlockSpec, simulate_recording

    rec = simulate_recording(56.0, artifact=ArtifactSpec(freq_hz=20.0, heart_depth=0.02, resp_depth=0.01,
                                                         drift_ppm=40.0, heart_phase_deg=2.0),
                             blocks=[BlockSpec(1.0, 54.0, ramp_s=1.0)], seed=6, n_channels=2)
    prov, y, whole = _pieces_and_whole(rec, tmp_path / "y.nix", max_range_s=9.0)
    assert len({r["start_s"] for r in prov["estimator_report"]}) >= 2
    assert all(r["blocks"][0]["phase_shift_followed"] for r in prov["estimator_report"])
    assert np.abs(y - whole).max() <= 1e-6 * np.ptp(rec.data)


def test_a_file_piece_is_cleaned_in_the_array_read_for_it(short_dac):
    """A task cleans the piece it read in place (its largest array, not copied): the same numbers as
    fit then transform on a copy. Outside tasks the input is never written (test_template)."""
    from artifactclean.parallel import piece_task
    from artifactclean.stimulation import fit_stimulation

    x, fs = short_dac
    model = fit_stimulation(x, fs)
    read = []

    class Source:
        def open(self):
            return self

        def read(self, a, b, channels):
            read.append(np.array(x[channels, a:b], dtype=np.float64))
            return read[-1]

    n = x.shape[1]
    y, lost, _ = piece_task(Source(), [0, 1, 2], 3, 0, n, 0, n, TemplateSubtraction(), model, None, fs)
    est = TemplateSubtraction().fit(x[:3].copy(), fs=fs, stim_model=model)
    np.testing.assert_array_equal(y, est.transform(x[:3]))
    np.testing.assert_array_equal(lost, est.lost_)
    # the array read for the task now holds the cleaned samples (lost ones at 0): no copy was made
    np.testing.assert_array_equal(read[0], y)


def test_freed_memory_is_handed_back_only_beyond_what_is_kept(monkeypatch):
    """``_release_memory(keep)`` trims the heap (glibc's ``malloc_trim``) only once the free memory it holds
    passes ``keep``; with nothing kept, or where the free memory cannot be read, it always trims."""
    from artifactclean.io import pipeline as pipe

    trims, held = [], [100.0]
    monkeypatch.setattr(pipe, "_TRIM", lambda pad: trims.append(pad))
    monkeypatch.setattr(pipe, "_HELD", lambda: held[0])
    for keep, expected in ((0.0, 1), (99.0, 1), (100.0, 0), (1e9, 0)):
        trims.clear()
        pipe._release_memory(keep)
        assert len(trims) == expected, keep
    monkeypatch.setattr(pipe, "_HELD", None)
    trims.clear()
    pipe._release_memory(1e9)
    assert trims == [0]


def test_the_free_heap_memory_is_read_from_glibc():
    """The free bytes ``_release_memory`` compares with what it keeps are glibc's own count
    (``mallinfo2().fordblks``, glibc's malloc.h): holes freed between live blocks raise it by their size."""
    from artifactclean.io import pipeline as pipe

    pipe._release_memory(float("inf"))  # binds the C functions, hands nothing back
    if not pipe._TRIM or pipe._HELD is None:
        pytest.skip("not glibc 2.33 or later")
    blocks = [bytearray(64 * 1024) for _ in range(1200)]  # under glibc's mmap threshold: from the heap
    before = pipe._HELD()
    del blocks[::2]  # 600 holes of 64 KiB between live blocks: no trim at the heap's top can take them
    assert pipe._HELD() - before > 0.9 * 600 * 64 * 1024
    del blocks


def test_a_file_run_keeps_the_memory_of_tasks_for_the_next(oe_file, tmp_path, monkeypatch):
    """On one worker, the heap keeps ``_KEPT_TASKS`` tasks' memory (``_task_shape``'s float64 values) from
    one task to the next rather than handing it back to fault it in again; on worker threads (heaps of
    their own) it keeps nothing."""
    from artifactclean import make_estimator
    from artifactclean.io import pipeline as pipe

    keeps = []
    monkeypatch.setattr(pipe, "_release_memory", lambda keep=0.0: keeps.append(keep))
    a, b = make_estimator("template").memory_per_sample
    task = 8 * 30_000 * (4 * a + b)  # the 1 s budget of _clean_file, 4 channels' worth
    for workers in (1, 2):
        keeps.clear()
        _clean_file(oe_file, tmp_path / f"kept{workers}.dat", workers=workers)
        assert len(keeps) > 4
        if workers == 1:
            assert min(keeps) >= pipe._KEPT_TASKS * task >= 2 * task
        else:
            assert set(keeps) == {0.0}


def test_task_shape_keeps_a_task_within_the_memory_of_four_channels():
    """Groups and spans from the estimator's memory per sample (per channel ``a``, shared ``b``): a task
    holds at most the memory of ``length`` samples of 4 channels, shared arrays counted, and at least
    ``held`` channels (a DAC piece's judges, fitted by a task of their own); its group is the largest whose
    span reaches ``least``; with nothing shared (``b = 0``) that is the old count of channels x time."""
    from artifactclean.io.pipeline import _task_shape

    length, fs = 900_000, 30_000
    for a, b in ((4.7, 21.0), (4.4, 8.0), (10.0, 20.5), (3.1, 0.0)):
        budget = length * (4 * a + b)
        for held in (0, 1, 4):
            for least_s in (30, 36, 64, 120):
                least = least_s * fs
                g, span = _task_shape(8, length, least, held, (a, b))
                assert 1 <= g <= 8
                assert span * (a * max(g, held) + b) <= budget * (1 + 1e-9)
                if span >= least and g < 8:
                    assert budget / (a * max(g + 1, held) + b) < least  # one more channel would not fit
                if span < least:
                    assert g == 1  # even one channel's piece is short: the shortest group
    assert _task_shape(8, length, length, 0, (3.1, 0.0)) == _task_shape(8, length, length, 1, (3.1, 0.0)) \
        == _task_shape(8, length, length, 4, (3.1, 0.0)) == (4, length)
    # four judges make every task as large as four channels: fewer channels get no longer a span than four
    assert _task_shape(8, length, 3 * length // 2, 0, (3.1, 0.0)) == (2, 2 * length)
    assert _task_shape(8, length, 3 * length // 2, 4, (3.1, 0.0)) == (1, length)
    # the template at 5 Hz (one channel, a context of 30 s): 46 s, not the 120 s four channels' samples gave
    g, span = _task_shape(8, length, 120 * fs, 0, (4.7, 21.0))
    assert g == 1 and 45 * fs < span < 47 * fs
