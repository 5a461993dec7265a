"""Command line: ``python -m tdkit demo``."""

from __future__ import annotations

import argparse
import sys

__all__ = ["main"]


def main(argv: list[str] | None = None) -> int:
    """Entry point of ``python -m tdkit``; returns the exit status."""
    parser = argparse.ArgumentParser(prog="python -m tdkit", description=__doc__)
    sub = parser.add_subparsers(dest="command", required=True)
    demo = sub.add_parser("demo", help="train on the built-in inventory scenario")
    demo.add_argument("--episodes", type=int, default=3000, help="training episodes")
    demo.add_argument("--seed", type=int, default=0, help="seed of the run")
    args = parser.parse_args(argv)
    if args.command == "demo":
        from .demo import run_demo

        run_demo(episodes=args.episodes, seed=args.seed)
        return 0
    return 2  # pragma: no cover - argparse rejects unknown commands


if __name__ == "__main__":
    sys.exit(main())
