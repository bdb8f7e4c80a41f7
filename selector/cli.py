"""The ``selector`` command: plain verbs over one configuration file.

Each subcommand is a small function that loads the config, calls the library and prints what it
did. Errors a user can cause (:class:`~selector.errors.SelectorError`) are printed as one line
with no traceback and exit code 2.
"""

from __future__ import annotations

import argparse
import sys
from pathlib import Path

import selector
from selector.errors import SelectorError


class _Version(argparse.Action):
    """``--version``: the version is looked up only when asked for (it costs a tenth of a second)."""

    def __init__(self, option_strings, dest=argparse.SUPPRESS, default=argparse.SUPPRESS, help=None):
        super().__init__(option_strings=option_strings, dest=dest, default=default, nargs=0,
                         help=help or "show the version and exit")

    def __call__(self, parser, namespace, values, option_string=None):
        sys.stdout.write(f"selector {selector.__version__}\n")
        parser.exit()


def _config_arg(p: argparse.ArgumentParser) -> None:
    p.add_argument("--config", required=True, metavar="FILE", help="TOML configuration file")


def _cmd_ingest(args) -> int:
    from selector import api
    from selector.store.layout import layout_of

    cfg = api.load_config(args.config)
    api.ingest(cfg, strict=args.strict, log=print)
    print(f"tiles written below {layout_of(cfg).tiles_dir}")
    return 0


def _cmd_run(args) -> int:
    from selector import api

    result = api.run(args.config, workers=args.workers, executor=args.executor, scheduler=args.scheduler,
                     quiet=args.quiet, verbose=args.verbose, force=args.force, strict=args.strict)
    return 0 if result.ok else 1


def _cmd_status(args) -> int:
    from selector import api

    print(api.status(args.config, runs=args.runs, failed_only=args.failed))
    return 0


def _cmd_train(args) -> int:
    from selector import api

    api.train(args.config, allow_incomplete=args.allow_incomplete, log=print)
    return 0


def _cmd_tune(args) -> int:
    from selector import api

    api.tune(args.config, settings=args.set or (), truth=args.truth, plots_dir=args.plots, write=args.write,
             allow_incomplete=args.allow_incomplete, log=print)
    return 0


def _cmd_report(args) -> int:
    from selector import api

    if args.top < 1:
        raise SelectorError(f"--top {args.top}: give at least 1 row")
    api.report(args.config, run_dir=args.run, out=args.out, top=args.top, allow_incomplete=args.allow_incomplete,
               log=print)
    return 0


def _cmd_targets(args) -> int:
    from selector import api

    api.targets(args.config, new_only=args.new_only, allow_incomplete=args.allow_incomplete, log=print)
    return 0


def _cmd_outcome(args) -> int:
    from selector import api

    api.outcomes(args.config, args.file, log=print)
    return 0


def _cmd_weigh(args) -> int:
    from selector import api

    api.weigh(args.config, args.file, log=print)
    return 0


def _cmd_demo(args) -> int:
    from selector.demo.mocksky import run_demo

    run_demo(Path(args.out), seed=args.seed, scale=args.scale, workers=args.workers)
    return 0


def _strict_arg(p: argparse.ArgumentParser) -> None:
    p.add_argument("--strict", action="store_true",
                   help="make the plausibility warnings (units, magnitude systems, no match, no candidates) errors")


def _allow_incomplete_arg(p: argparse.ArgumentParser) -> None:
    p.add_argument("--allow-incomplete", action="store_true",
                   help="go ahead on a run whose failed tiles are missing from its outputs (stated in the outputs)")


#: An example line for each command's help (shown under its options).
EXAMPLES = {
    "ingest": "selector ingest --config my.toml",
    "run": "selector run --config my.toml --workers 2",
    "demo": "selector demo --out demo-out --scale 0.3",
    "status": "selector status --config my.toml --runs 3",
    "train": "selector train --config my.toml",
    "targets": "selector targets --config my.toml --new-only",
    "outcome": "selector outcome --config my.toml --file spectra.csv",
    "weigh": "selector weigh --config my.toml --file spectra.csv",
    "tune": "selector tune --config my.toml --set motion.parallax_snr_max=4 --set colours.criteria=stern2012",
    "report": "selector report --config my.toml   (or: selector report --run selector-output/run)",
}


def _command(sub, name: str, help: str, **kwargs) -> argparse.ArgumentParser:
    """A subcommand whose help ends with its example line."""
    epilog = kwargs.pop("epilog", None) or f"example: {EXAMPLES[name]}"
    return sub.add_parser(name, help=help, epilog=epilog, **kwargs)


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="selector",
        description="Select luminous quasar candidates: cross-match an astrometric and an infrared catalogue on "
                    "HEALPix tiles, test for zero parallax and proper motion, apply infrared colour criteria, rank.",
    )
    parser.add_argument("--version", action=_Version)
    sub = parser.add_subparsers(dest="command", metavar="COMMAND")

    p = _command(sub, "ingest", help="map columns, validate rows and split the catalogues into tiles")
    _config_arg(p)
    _strict_arg(p)
    p.set_defaults(func=_cmd_ingest)

    p = _command(sub, "run", help="cross-match, test and rank every tile; write the candidate list")
    _config_arg(p)
    p.add_argument("--workers", type=int, default=None, help="worker processes (default: the config's run.workers)")
    p.add_argument("--executor", choices=("local", "dask"), default=None, help="where tiles run (default: config)")
    p.add_argument("--scheduler", default=None, metavar="ADDRESS", help="Dask scheduler address")
    p.add_argument("--quiet", action="store_true", help="print only the final summary")
    p.add_argument("--verbose", action="store_true", help="print a line per tile")
    p.add_argument("--force", action="store_true", help="recompute every tile, whatever the run manifest says")
    _strict_arg(p)
    p.set_defaults(func=_cmd_run)

    p = _command(sub, "demo", help="write an invented mock sky, ingest it, run the whole job and score it")
    p.add_argument("--out", required=True, metavar="DIR", help="folder for the mock catalogues and all outputs")
    p.add_argument("--seed", type=int, default=1, help="seed of the mock sky")
    p.add_argument("--scale", type=float, default=1.0, help="size of the mock sky (1.0: about 2e5 sources)")
    p.add_argument("--workers", type=int, default=None, help="worker processes (default: one per core)")
    p.set_defaults(func=_cmd_demo)

    p = _command(sub, "status", help="show the run manifest: runs, tiles done, failed and pending, rows, timings")
    _config_arg(p)
    p.add_argument("--runs", type=int, default=10, metavar="N", help="show the last N runs (default 10)")
    p.add_argument("--failed", action="store_true", help="list only the failed tiles and their errors")
    p.set_defaults(func=_cmd_status)

    p = _command(sub, "train", help="train the quasar classifier on labelled sources of the feature cache; write "
                                     "the model, its card and a held-out evaluation")
    _config_arg(p)
    _allow_incomplete_arg(p)
    p.set_defaults(func=_cmd_train)

    p = _command(sub, "targets", help="follow-up list: known objects out, observability from a site, priorities")
    _config_arg(p)
    p.add_argument("--new-only", action="store_true",
                   help="write only the targets that are not in the previous list (each `selector targets` makes "
                        "a numbered list in the candidate history; running it again on the same run's candidates "
                        "is the same list, so nothing is new the second time)")
    _allow_incomplete_arg(p)
    p.set_defaults(func=_cmd_targets)

    p = _command(sub, "outcome", help="record follow-up outcomes (spectroscopic class, redshift) of candidates")
    _config_arg(p)
    p.add_argument("--file", required=True, metavar="FILE",
                   help="CSV, ECSV, VOTable, FITS or Parquet with columns astro_id (or candidate_id, id), "
                        "spec_class (or spectroscopic_class, class: quasar, star, galaxy) and optionally redshift (or z)")
    p.set_defaults(func=_cmd_outcome)

    p = _command(sub, "weigh", help="black-hole masses, bolometric luminosities, Eddington ratios and accretion rates from "
                      "broad-line widths",
        description="Weigh the black holes of confirmed quasars from a spectroscopy file: single-epoch virial "
                    "masses from C IV, Mg II and Hbeta widths, the adopted mass (Hbeta, then Mg II, then C IV), "
                    "L_bol, Eddington ratio and accretion-rate range, under the config's [physics]. Writes "
                    "project.output_dir/physics/<file>_masses.{ecsv,vot,parquet} and <file>_rejects.ecsv.",
        epilog="example: selector weigh --config my.toml --file spectra.csv   (a CSV line: "
               "astro_id,redshift,fwhm_mgii_kms,fwhm_mgii_err_kms,lamL3000_erg_s,lamL3000_err_erg_s → "
               "1234,1.8,3500,200,1e45,5e43)")
    _config_arg(p)
    p.add_argument("--file", required=True, metavar="SPECTRA",
                   help="CSV, ECSV, VOTable, FITS or Parquet: astro_id (or candidate_id, id), redshift (or z), "
                        "fwhm_<line>_kms and fwhm_<line>_err_kms for civ, mgii, hbeta, and lamL<W>_erg_s, "
                        "lamL<W>_err_erg_s or fnu<W>_mjy, fnu<W>_err_mjy for W = 1350, 3000, 5100")
    p.set_defaults(func=_cmd_weigh)

    p = _command(sub, "tune", help="re-apply changed cuts to the run's feature cache in seconds; cut-flow before and after",
        description="Compare the run's selection with the config file's (plus --set changes) on the cached "
                    "features, without matching again. Writes nothing unless --plots or --write is given.")
    _config_arg(p)
    p.add_argument("--set", action="append", metavar="KEY=VALUE",
                   help="change a selection setting, e.g. motion.parallax_snr_max=4, colours.criteria=assef2018_r75 "
                        "(a list: colours.criteria='[\"stern2012\", \"assef2018_r75\"]'), classifier.threshold=0.7 "
                        "(repeatable; KEY= restores the default)")
    p.add_argument("--truth", metavar="FILE", default=None,
                   help="truth labels (columns id and population or label) for completeness and purity; "
                        "default: catalogues/truth.parquet beside the config, if present")
    p.add_argument("--plots", metavar="DIR", default=None, help="write PNG diagnostics of the new selection here")
    p.add_argument("--write", action="store_true",
                   help="make the new selection the run's result (rewrites the run's candidates and cut-flows)")
    _allow_incomplete_arg(p)
    p.set_defaults(func=_cmd_tune)

    p = _command(sub, "report", help="one self-contained HTML page of a run: results first, then plots, then "
                                     "provenance and settings",
                 description="Write the run's report: headline numbers, the ranked candidates (the targets, when "
                             "`selector targets` has made a list), the diagnostic plots, then provenance and "
                             "the selection settings that were applied.")
    where = p.add_mutually_exclusive_group(required=True)
    where.add_argument("--config", metavar="FILE", help="TOML configuration file (the report of its run folder)")
    where.add_argument("--run", metavar="DIR",
                       help="a run folder (project.output_dir/run, which holds provenance.json), read alone")
    p.add_argument("--out", default=None, metavar="FILE",
                   help="where to write the page (default: report.html in the run folder)")
    p.add_argument("--top", type=int, default=50, help="rows of the ranked table (default: 50)")
    _allow_incomplete_arg(p)
    p.set_defaults(func=_cmd_report)
    return parser


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
    except Exception as exc:
        # a full disk can surface from any library (SQLite, Arrow, astropy) in its own words
        from selector.store.io import no_space

        if not no_space(exc):
            raise
        print(f"selector: no space left on the device ({str(exc).strip().splitlines()[0]}); free some space or move "
              "project.output_dir, then run the command again (finished work is kept)", file=sys.stderr)
        return 2


if __name__ == "__main__":
    sys.exit(main())
