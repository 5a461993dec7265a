"""Command line: ``python -m tdkit demo`` and ``python -m tdkit verify module:factory``."""

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
    verify = sub.add_parser(
        "verify",
        help="run the verifier's checks on an agent factory and print the report",
        description="Run tdkit.verify.verify_agent on make_agent(env, seed) and print the "
        "report; the exit status is 1 when a check fails (2 when the factory cannot be loaded).",
    )
    verify.add_argument("factory", help="package.module:factory, a make_agent(env, seed)")
    verify.add_argument("--level", choices=("quick", "full"), default="quick",
                        help="quick (default, a few seconds) or full (more seeds and problems)")
    verify.add_argument("--seed", type=int, default=0, help="root seed of the checks")
    args = parser.parse_args(argv)
    if args.command == "demo":
        from .demo import run_demo

        run_demo(episodes=args.episodes, seed=args.seed)
        return 0
    if args.command == "verify":
        from .verify._cli import main_verify

        return main_verify(args.factory, level=args.level, seed=args.seed)
    return 2  # pragma: no cover - argparse rejects unknown commands


if __name__ == "__main__":
    sys.exit(main())
