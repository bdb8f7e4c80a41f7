"""The ``selector`` command: plain verbs over one configuration file.

Each subcommand is a small function that loads the config, calls the library and prints what it
did. Errors a user can cause (:class:`~selector.errors.SelectorError`) are printed as one line
with no traceback and exit code 2.
"""

from __future__ import annotations

import argparse
import sys
from pathlib import Path

from . import __version__
from .errors import SelectorError


def _config_arg(p: argparse.ArgumentParser) -> None:
    p.add_argument("--config", required=True, metavar="FILE", help="TOML configuration file")


def _cmd_ingest(args) -> int:
    from .config import load_config
    from .ingest import ingest

    cfg = load_config(args.config)
    ingest(cfg, log=print)
    print(f"tiles written below {cfg.tiles_dir}")
    return 0


def _cmd_run(args) -> int:
    from .batch import run
    from .config import load_config

    cfg = load_config(args.config)
    result = run(cfg, workers=args.workers, executor=args.executor, scheduler=args.scheduler,
                 quiet=args.quiet, verbose=args.verbose, force=args.force, config_path=args.config)
    return 0 if result.ok else 1


def _cmd_demo(args) -> int:
    from .demo import run_demo

    run_demo(Path(args.out), seed=args.seed, scale=args.scale, workers=args.workers)
    return 0


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="selector",
        description="Select luminous quasar candidates: cross-match an astrometric and an infrared catalogue on "
                    "HEALPix tiles, test for zero parallax and proper motion, apply infrared colour criteria, rank.",
    )
    parser.add_argument("--version", action="version", version=f"selector {__version__}")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND")

    p = sub.add_parser("ingest", help="map columns, validate rows and split the catalogues into tiles")
    _config_arg(p)
    p.set_defaults(func=_cmd_ingest)

    p = sub.add_parser("run", help="cross-match, test and rank every tile; write the candidate list")
    _config_arg(p)
    p.add_argument("--workers", type=int, default=None, help="worker processes (default: the config's run.workers)")
    p.add_argument("--executor", choices=("local", "dask"), default=None, help="where tiles run (default: config)")
    p.add_argument("--scheduler", default=None, metavar="ADDRESS", help="Dask scheduler address")
    p.add_argument("--quiet", action="store_true", help="print only the final summary")
    p.add_argument("--verbose", action="store_true", help="print a line per tile")
    p.add_argument("--force", action="store_true", help="recompute every tile, whatever the run manifest says")
    p.set_defaults(func=_cmd_run)

    p = sub.add_parser("demo", help="write an invented mock sky, ingest it, run the whole job and score it")
    p.add_argument("--out", required=True, metavar="DIR", help="folder for the mock catalogues and all outputs")
    p.add_argument("--seed", type=int, default=1, help="seed of the mock sky")
    p.add_argument("--scale", type=float, default=1.0, help="size of the mock sky (1.0: about 2e5 sources)")
    p.add_argument("--workers", type=int, default=None, help="worker processes (default: one per core)")
    p.set_defaults(func=_cmd_demo)

    _add_optional_commands(sub)
    return parser


def _add_optional_commands(sub) -> None:
    """Subcommands that live beside their own modules (each module exposes ``add_command(sub)``)."""
    import importlib

    for name in ("selector.batch", "selector.classify", "selector.followup", "selector.report"):
        try:
            module = importlib.import_module(name)
        except ImportError as exc:
            if exc.name == name:
                continue
            raise
        hook = getattr(module, "add_commands", None)
        if hook is not None:
            hook(sub, _config_arg)


def main(argv=None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    if not getattr(args, "func", None):
        parser.print_help()
        return 2
    try:
        return int(args.func(args) or 0)
    except SelectorError as exc:
        print(f"selector: {exc}", file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        print("selector: interrupted", file=sys.stderr)
        return 130


if __name__ == "__main__":
    sys.exit(main())
