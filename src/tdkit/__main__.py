"""Command line: ``tdkit demo`` and ``tdkit verify module:factory``.

Installed, the command is ``tdkit``; without installing, ``python -m tdkit``
does the same.
"""

from __future__ import annotations

import argparse
import sys

__all__ = ["main"]

# --quick: enough to see every part of the output in a few seconds (tests use it).
_QUICK = {"episodes": 100, "seeds": 2, "jobs": 1}


def _prog(argv0: str | None = None) -> str:
    """``tdkit`` when run through the installed command, else ``python -m tdkit``."""
    argv0 = sys.argv[0] if argv0 is None and sys.argv else (argv0 or "")
    name = argv0.replace("\\", "/").rsplit("/", 1)[-1].lower()
    if name.endswith(".exe"):
        name = name[:-4]
    return "tdkit" if name in ("tdkit", "tdkit-script.py") else "python -m tdkit"


def _parser(prog: str) -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog=prog,
        description="tdkit: reference tabular temporal-difference learners. Run the demo, or "
        "check your own agent with the verifier.",
        epilog="Guides: docs/index.md in the tdkit repository.",
    )
    sub = parser.add_subparsers(dest="command", required=True, metavar="{demo,verify}")
    demo = sub.add_parser(
        "demo",
        help="learn a restocking policy with several learners and compare with the optimum",
        description="Train Q-learning, Expected SARSA and Double Q-learning over several seeds "
        "on the built-in inventory scenario (invented numbers), print each learned policy's "
        "exact value next to the optimum, and write PNG figures (with matplotlib installed).",
    )
    demo.add_argument("--quick", action="store_true",
                      help=f"a few seconds: {_QUICK['episodes']} episodes, {_QUICK['seeds']} "
                      "seeds, one process")
    demo.add_argument("--episodes", type=int, default=None,
                      help="training episodes per run (default 2000; 52 weeks each)")
    demo.add_argument("--seeds", type=int, default=None, help="runs per learner (default 5)")
    demo.add_argument("--seed", type=int, default=0, help="root seed of the demo (default 0)")
    demo.add_argument("--out", default="tdkit-demo", metavar="DIR",
                      help="folder for the figures (default: ./tdkit-demo)")
    demo.add_argument("--jobs", type=int, default=None,
                      help="worker processes (default: one per CPU core)")
    demo.add_argument("--no-progress", action="store_true", help="no progress bar")
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
    return parser


def main(argv: list[str] | None = None) -> int:
    """Entry point of the ``tdkit`` command and ``python -m tdkit``; returns the exit status."""
    parser = _parser(_prog())
    args = parser.parse_args(argv)
    if args.command == "demo":
        from ._errors import InvalidParameterError
        from .demo import run_demo

        settings = dict(_QUICK) if args.quick else {"episodes": 2000, "seeds": 5, "jobs": None}
        for key in ("episodes", "seeds", "jobs"):
            if getattr(args, key) is not None:
                settings[key] = getattr(args, key)
        try:
            run_demo(seed=args.seed, out=args.out, progress=not args.no_progress, **settings)
        except InvalidParameterError as exc:
            parser.exit(2, f"{parser.prog} demo: error: {exc}\n")
        return 0
    if args.command == "verify":
        from .verify._cli import main_verify

        return main_verify(args.factory, level=args.level, seed=args.seed)
    return 2  # pragma: no cover - argparse rejects unknown commands


if __name__ == "__main__":
    sys.exit(main())
