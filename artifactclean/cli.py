"""Command line: ``artifactclean demo``."""

from __future__ import annotations

import argparse
import sys

from ._version import __version__


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
    return p


def main(argv=None) -> int:
    args = _parser().parse_args(argv)
    try:
        if args.command == "demo":
            from .demo import run_demo

            if args.duration < 30:
                raise ValueError("--duration must be at least 30 s (the demo session has three blocks)")
            run_demo(args.out, seed=args.seed, duration_s=args.duration)
        return 0
    except KeyboardInterrupt:
        print("artifactclean: interrupted", file=sys.stderr)
        return 130
    except (ValueError, TypeError, OSError) as exc:
        if args.debug:
            raise
        print(f"artifactclean: error: {exc}", file=sys.stderr)
        return 2


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
