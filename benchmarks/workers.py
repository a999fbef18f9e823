"""One worker against two, and a dask cluster against local, as ratios from one run.

* an array (``--channels`` x ``--seconds`` at 30 kHz, 20 Hz with harmonics and
  modulation): ``clean(workers=1)`` against ``clean(workers=2)``, best of
  ``--repeat``; the outputs must be equal;
* an Open Ephys binary file of the same: ``clean_recording`` with 1 and 2
  worker threads, and on a ``dask.distributed.LocalCluster`` of 2 worker
  processes (skipped without dask); the ``.dat`` files must be equal;
* the machine's own ceiling, timed in turns with the array runs: a compiled
  loop with no serial part and no memory traffic, twice on one thread
  against once on each of two (skipped without numba). On a virtual machine
  whose two cores share a host this is below 2, and the most any cleaning
  can gain from a second worker at that moment.

    python benchmarks/workers.py [--channels 16] [--seconds 20] [--repeat 3]
"""

from __future__ import annotations

import argparse
import tempfile
import time
import warnings
from pathlib import Path

import numpy as np


def best_in_turns(fns, repeat: int):
    """Best time of each function in ``fns``, run in turns ``repeat`` times, and their last outputs.

    Alternating keeps every run under the same load on a shared machine (run
    back to back, one worker's times drifted 1.5-3.4 s within one run while
    the other core's load changed).
    """
    times, outs = [[] for _ in fns], [None] * len(fns)
    for _ in range(repeat):
        for k, fn in enumerate(fns):
            t0 = time.perf_counter()
            outs[k] = fn()
            times[k].append(time.perf_counter() - t0)
    return [min(t) for t in times], outs


def best_pair(fn1, fn2, repeat: int):
    """:func:`best_in_turns` of two functions: both best times, then both outputs."""
    (t1, t2), (y1, y2) = best_in_turns((fn1, fn2), repeat)
    return t1, t2, y1, y2


def ceiling_loops(seconds: float = 0.5):
    """Two runs of a compute-bound compiled loop, on one thread and on two (None without numba).

    The loop has no serial part and no memory traffic: the ratio of the two
    times is what this machine gives to a second thread at that moment (on a
    virtual machine whose cores share a host, less than 2).
    """
    try:
        import numba
    except ImportError:
        return None
    from concurrent.futures import ThreadPoolExecutor

    @numba.njit(nogil=True, cache=False)
    def spin(n):
        s = 0.0
        for i in range(n):
            s += np.sin(i * 1e-3)
        return s

    spin(10)  # compile outside the timing
    t0 = time.perf_counter()
    spin(1_000_000)
    n = max(1_000_000, int(seconds / max(time.perf_counter() - t0, 1e-6) * 1_000_000))
    pool = ThreadPoolExecutor(max_workers=2)
    return (lambda: (spin(n), spin(n))), (lambda: list(pool.map(spin, (n, n))))


def main(argv=None) -> dict:
    from artifactclean import clean
    from artifactclean.demo_files import write_openephys_binary
    from artifactclean.io import open_recording
    from artifactclean.io.pipeline import clean_recording
    from artifactclean.synthetic import ArtifactSpec, BlockSpec, NeuralSpec, simulate_recording

    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--channels", type=int, default=16)
    ap.add_argument("--seconds", type=float, default=20.0)
    ap.add_argument("--repeat", type=int, default=3)
    ap.add_argument("--method", default="template")
    args = ap.parse_args(argv)
    warnings.simplefilter("ignore")
    rec = simulate_recording(args.seconds, n_channels=args.channels,
                             artifact=ArtifactSpec(freq_hz=20.0, heart_depth=0.02, resp_depth=0.01, drift_ppm=40.0),
                             neural=NeuralSpec(units=[]), blocks=[BlockSpec(1.0, args.seconds - 1.0, ramp_s=1.0)],
                             seed=3)
    x = rec.data
    clean(x[:2, : int(5 * rec.fs)], rec.fs, method=args.method)  # compile the kernels outside the timing
    runs = [lambda: clean(x, rec.fs, method=args.method, workers=1),
            lambda: clean(x, rec.fs, method=args.method, workers=2)]
    loops = ceiling_loops(0.05 * args.seconds * args.channels / 16)  # a pair about as long as a run
    # the machine's ceiling in turns with the array runs: the same load for both
    times, (y1, y2, *_) = best_in_turns(runs + list(loops or ()), args.repeat)
    res = dict(array=dict(one=times[0], two=times[1], equal=bool(np.array_equal(y1, y2))),
               ceiling=None if loops is None else times[2] / times[3])
    with tempfile.TemporaryDirectory() as tmp:
        tmp = Path(tmp)
        fs = rec.fs
        root = write_openephys_binary(tmp / "rec", x, fs)
        x = y1 = y2 = rec = None  # free the array before the file runs

        def run(out, **kw):
            return lambda: clean_recording(open_recording(root), tmp / out, method=args.method, force=True, **kw)

        f1, f2, _, _ = best_pair(run("one.dat"), run("two.dat", workers=2), args.repeat)
        res["file"] = dict(one=f1, two=f2, equal=(tmp / "one.dat").read_bytes() == (tmp / "two.dat").read_bytes())
        try:
            from dask.distributed import Client, LocalCluster
        except ImportError:
            res["dask"] = None
        else:
            with LocalCluster(n_workers=2, threads_per_worker=1, processes=True, dashboard_address=None) as lc, \
                    Client(lc) as client:
                run("dask.dat", cluster=client)()  # workers import and compile once
                f1d, fd, _, _ = best_pair(run("one.dat"), run("dask.dat", cluster=client), args.repeat)
            res["dask"] = dict(one=f1d, seconds=fd,
                               equal=(tmp / "one.dat").read_bytes() == (tmp / "dask.dat").read_bytes())
    print(f"{args.channels} channels x {args.seconds:g} s at 30 kHz, {args.method!r}, best of {args.repeat} in turns")
    print(f"{'run':<34} {'speed-up vs 1 worker':>21} {'same output':>12}")
    print(f"{'array, 2 worker threads':<34} {res['array']['one'] / res['array']['two']:>21.2f} "
          f"{str(res['array']['equal']):>12}")
    print(f"{'file, 2 worker threads':<34} {res['file']['one'] / res['file']['two']:>21.2f} "
          f"{str(res['file']['equal']):>12}")
    if res["dask"] is not None:
        print(f"{'file, dask LocalCluster 2 procs':<34} {res['dask']['one'] / res['dask']['seconds']:>21.2f} "
              f"{str(res['dask']['equal']):>12}")
    if res["ceiling"] is not None:
        print(f"{'compiled loop, 2 threads (ceiling)':<34} {res['ceiling']:>21.2f} {'-':>12}")
    return res


if __name__ == "__main__":
    main()
