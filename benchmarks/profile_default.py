"""Where the default method's time goes: a profile, as shares of the total.

Runs ``clean`` (the default method) under :mod:`cProfile` on a named
synthetic scenario and prints the functions that take the largest share of
the run's own time, and of its cumulative time. Shares, not seconds: they
hold on a noisy shared machine and say where optimising pays.

    python benchmarks/profile_default.py [--scenario modulated_20hz_dac] [--seconds 20] [--top 15]
"""

from __future__ import annotations

import argparse
import cProfile
import pstats
import warnings


def main(argv=None) -> list[tuple[str, float, float]]:
    from artifactclean import DEFAULT_METHOD, clean
    from artifactclean.scenarios import SCENARIOS, make_scenario

    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--scenario", default="modulated_20hz_dac", choices=sorted(SCENARIOS))
    ap.add_argument("--seconds", type=float, default=20.0)
    ap.add_argument("--top", type=int, default=15)
    args = ap.parse_args(argv)
    warnings.simplefilter("ignore")
    rec = make_scenario(args.scenario, seed=1, duration_s=args.seconds)
    clean(rec.data[:, : int(5 * rec.fs)], rec.fs)  # compile the kernels outside the profile
    prof = cProfile.Profile()
    prof.runcall(clean, rec.data, rec.fs)
    stats = pstats.Stats(prof)
    total = sum(v[2] for v in stats.stats.values())  # own time of every function
    rows = []
    for (file, line, name), (_, _, own, cum, _) in stats.stats.items():
        where = f"{file.rsplit('/', 2)[-1]}:{line}({name})" if line else name
        rows.append((where, own / total, cum / total))
    rows.sort(key=lambda r: -r[1])
    print(f"{DEFAULT_METHOD!r} on {args.scenario}, {rec.data.shape[0]} channels x {args.seconds:g} s")
    print(f"{'function':<60} {'own share':>10} {'cumulative':>11}")
    for where, own, cum in rows[: args.top]:
        print(f"{where[:60]:<60} {own:>10.3f} {cum:>11.3f}")
    return rows


if __name__ == "__main__":
    main()
