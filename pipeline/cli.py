"""The ``gapline`` command (also ``python -m pipeline``).

Exit status: 0 success; 1 verification failed; 2 a user error (one line on stderr, no
traceback); 130 interrupted.
"""

from __future__ import annotations

import argparse
import sys

from pipeline.errors import GaplineError

__all__ = ["main"]

EXIT_OK, EXIT_VERIFY_FAILED, EXIT_USER_ERROR, EXIT_INTERRUPTED = 0, 1, 2, 130


class _Parser(argparse.ArgumentParser):
    def error(self, message: str) -> None:  # one line, status 2, like every user error
        raise GaplineError(f"{message} (see 'gapline {self.prog.split()[-1]} --help')"
                           if " " in self.prog else f"{message} (see 'gapline --help')")


def _parser() -> argparse.ArgumentParser:
    parser = _Parser(prog="gapline", description="Spectral analysis of Markov generators.")
    commands = parser.add_subparsers(dest="command", required=True, parser_class=_Parser)

    run = commands.add_parser("run", help="run the stages of a config")
    run.add_argument("config", help="TOML config file")
    run.add_argument("--store", help="zarr store directory (default: store.path of the config)")
    run.add_argument("--set", dest="overrides", action="append", default=[],
                     metavar="KEY=VALUE", help="override a config field, e.g. solve.modes=12")
    which = run.add_mutually_exclusive_group()
    which.add_argument("--from", dest="start", metavar="STAGE",
                       help="rerun from this stage on (earlier ones must be stored)")
    which.add_argument("--only", metavar="STAGE", help="rerun just this stage")

    check = commands.add_parser("check", help="validate a config; print size and memory")
    check.add_argument("config")
    check.add_argument("--set", dest="overrides", action="append", default=[],
                       metavar="KEY=VALUE")

    show = commands.add_parser("show", help="list the runs of a store, or one run in detail")
    show.add_argument("store")
    show.add_argument("run", nargs="?")

    commands.add_parser("schema", help="print the config reference (Markdown)")
    return parser


def main(argv: list[str] | None = None) -> int:
    try:
        args = _parser().parse_args(argv)
        if args.command == "run":
            return _run(args)
        if args.command == "check":
            return _check(args)
        if args.command == "show":
            return _show(args)
        if args.command == "schema":
            from pipeline.config import describe_schema

            print(describe_schema())
            return EXIT_OK
    except GaplineError as error:
        _say(f"gapline: error: {error}")
        return EXIT_USER_ERROR
    except MemoryError:
        _say("gapline: error: out of memory; fix: fewer states or modes (see 'gapline check')")
        return EXIT_USER_ERROR
    except OSError as error:
        _say(f"gapline: error: {error.strerror or error}: {error.filename or ''}".rstrip(": "))
        return EXIT_USER_ERROR
    except KeyboardInterrupt:
        _say("gapline: interrupted; committed stages are kept, the interrupted one is not")
        return EXIT_INTERRUPTED
    return EXIT_USER_ERROR


def _say(message: str) -> None:
    """An error line on stderr, once per job (rank 0 under MPI: every rank has the same)."""
    from pipeline.parallel import world

    if world().is_root:
        print(message, file=sys.stderr)


def _run(args: argparse.Namespace) -> int:
    from pipeline.config import load_config
    from pipeline.stages.runner import run_pipeline

    config = load_config(args.config, args.overrides)
    outcome = run_pipeline(config, store_path=args.store, start=args.start, only=args.only)
    if outcome.verified is False:
        _say(f"gapline: verification FAILED for run {outcome.run!r} (see the checks above)")
        return EXIT_VERIFY_FAILED
    return EXIT_OK


def _check(args: argparse.Namespace) -> int:
    from pipeline.config import load_config
    from pipeline.estimate import estimate_resources
    from pipeline.models import build_model

    config = load_config(args.config, args.overrides)
    model = build_model(config.model)
    estimate = estimate_resources(model, config)
    print(f"config {args.config}: valid")
    for key, value in estimate.items():
        print(f"  {key:<22} {value}")
    for note in model.warnings():
        print(f"  warning: {note}")
    return EXIT_OK


def _show(args: argparse.Namespace) -> int:
    from pipeline.stages.report import summarize
    from pipeline.store import Store

    store = Store(args.store)
    if args.run:
        print(summarize(store, args.run))
        return EXIT_OK
    runs = store.runs()
    if not runs:
        print(f"store {args.store}: no runs")
        return EXIT_OK
    header = (f"{'run':<24} {'model':<32} {'states':>10} {'backend':<8} {'certified':<9} "
              f"{'gap / decay rate':>18} {'verify':<7}")
    print(header)
    print("-" * len(header))
    for run in runs:
        print(_run_row(store, run))
    return EXIT_OK


def _run_row(store, run: str) -> str:
    from pipeline.stages.report import model_line
    from pipeline.verification.checks import spectral_gap

    attrs = store.run_attrs(run)
    model = model_line(attrs.get("model", {}))
    states = attrs.get("model", {}).get("n_states", "?")
    spectrum = store.group(run, "spectrum", required=False)
    backend = certified = gap_text = "-"
    if spectrum is not None:
        backend = spectrum.attrs["backend"]
        certified = "yes" if spectrum.attrs["certified"] else "NO"
        gap = spectral_gap(spectrum["eigenvalues"][:], attrs.get("model", {}).get("conserving",
                                                                                  True))
        gap_text = f"{gap:.6e}" if gap is not None else "-"
    verify = store.group(run, "verify", required=False)
    status = store.group_status(run, "verify")
    if verify is not None:
        verdict = "passed" if verify.attrs["passed"] else "FAILED"
    else:
        verdict = {"missing": "-", "stale": "stale"}.get(status, "partial")
    return (f"{run:<24} {model[:32]:<32} {states!s:>10} {backend:<8} {certified:<9} "
            f"{gap_text:>18} {verdict:<7}")
