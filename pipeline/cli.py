"""The ``gapline`` command (also ``python -m pipeline``).

Exit status: 0 success; 1 verification failed; 2 a user error (one line on stderr, no
traceback); 130 interrupted.
"""

from __future__ import annotations

import argparse
import sys
from pathlib import Path

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

    sweep = commands.add_parser("sweep", help="run every task of the config's [sweep] on dask")
    sweep.add_argument("config")
    sweep.add_argument("--store", help="zarr store directory (default: store.path)")
    sweep.add_argument("--set", dest="overrides", action="append", default=[],
                       metavar="KEY=VALUE")
    sweep.add_argument("--scheduler", choices=("local", "slurm", "pbs"),
                       help="override cluster.scheduler")
    sweep.add_argument("--workers", type=int, help="override cluster.workers")

    task = commands.add_parser("sweep-task", help="run one task of a sweep (batch job arrays)")
    task.add_argument("config")
    task.add_argument("--index", type=int, required=True, help="task index, from 0")
    task.add_argument("--store", help="zarr store directory (default: store.path)")
    task.add_argument("--set", dest="overrides", action="append", default=[],
                      metavar="KEY=VALUE")

    collect = commands.add_parser("collect", help="one dataset of a sweep's results, with the "
                                  "power-law fit of the gap against size")
    collect.add_argument("store")
    collect.add_argument("sweep")

    submit = commands.add_parser("submit", help="batch scripts for a run or a sweep; submit "
                                 "them (or --dry-run: only write and print them)")
    submit.add_argument("config")
    submit.add_argument("--scheduler", choices=("slurm", "pbs"), required=True)
    submit.add_argument("--store", help="zarr store directory (default: store.path)")
    submit.add_argument("--set", dest="overrides", action="append", default=[],
                        metavar="KEY=VALUE")
    submit.add_argument("--dry-run", action="store_true", help="write the scripts, submit nothing")
    submit.add_argument("--jobs-dir", help="where scripts and job logs go (default: "
                        "STORE.jobs/NAME)")

    report = commands.add_parser("report", help="figures (PNG) and one HTML page for a run "
                                 "or a collected sweep")
    report.add_argument("store")
    report.add_argument("name", nargs="?", help="a run or a sweep (default: every run)")
    report.add_argument("--out", help="output folder (default: STORE.report/NAME)")
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
        if args.command in _COMMANDS:
            return _COMMANDS[args.command](args)
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
    if config.sweep is not None:
        from pipeline.progress import log

        log(f"note: the config has a [sweep]; 'gapline run' runs the base config only (run "
            f"{config.run.name!r}); 'gapline sweep {args.config}' runs the sweep")
    outcome = run_pipeline(config, store_path=args.store, start=args.start, only=args.only)
    if outcome.verified is False:
        _say(f"gapline: verification FAILED for run {outcome.run!r} (see the checks above)")
        return EXIT_VERIFY_FAILED
    return EXIT_OK


def _sweep(args: argparse.Namespace) -> int:
    import dataclasses

    from pipeline.cluster import run_tasks
    from pipeline.config import load_config
    from pipeline.store import Store
    from pipeline.sweep import record_sweep, sweep_tasks, task_is_complete

    config = load_config(args.config, args.overrides)
    settings = config.cluster
    if args.scheduler:
        settings = dataclasses.replace(settings, scheduler=args.scheduler)
    if args.workers is not None:
        if args.workers < 1:
            raise GaplineError(f"--workers: must be >= 1, got {args.workers}")
        settings = dataclasses.replace(settings, workers=args.workers)
    store = Store(args.store or config.store.path, create=True)
    tasks = sweep_tasks(config, store)
    record_sweep(store, config, tasks)
    missing = [task for task in tasks if not task_is_complete(store, task)]
    print(f"sweep {config.sweep.name}: {len(tasks)} tasks, {len(tasks) - len(missing)} up to "
          f"date, {len(missing)} to run on {settings.scheduler} ({settings.workers} workers)",
          flush=True)

    def show(result) -> None:
        text = result.status if result.error is None else f"failed: {result.error}"
        if result.verified is False:
            text += " (verification FAILED)"
        print(f"  task {result.index:3d} {result.run}: {text}", flush=True)

    results = run_tasks(missing, str(store.path.resolve()), settings, on_result=show,
                        log_directory=Path(str(store.path) + ".jobs") / config.sweep.name)
    failed = [r for r in results if r.status == "failed"]
    unverified = [r for r in results if r.verified is False]
    print(f"sweep {config.sweep.name}: {len(results) - len(failed)} of {len(missing)} run, "
          f"{len(failed)} failed; collect with 'gapline collect {store.path} "
          f"{config.sweep.name}'", flush=True)
    return EXIT_VERIFY_FAILED if failed or unverified else EXIT_OK


def _sweep_task(args: argparse.Namespace) -> int:
    from pipeline.config import load_config
    from pipeline.store import Store
    from pipeline.sweep import run_task, sweep_tasks

    config = load_config(args.config, args.overrides)
    store = Store(args.store or config.store.path, create=True)
    tasks = sweep_tasks(config, store)
    if not 0 <= args.index < len(tasks):
        raise GaplineError(f"--index: the sweep has tasks 0..{len(tasks) - 1}, got {args.index}")
    result = run_task(tasks[args.index], str(store.path))
    print(f"task {result.index} {result.run}: {result.status}"
          + (f": {result.error}" if result.error else ""), flush=True)
    return EXIT_OK if result.status != "failed" and result.verified is not False else \
        EXIT_VERIFY_FAILED


def _collect(args: argparse.Namespace) -> int:
    from pipeline.collect import collect_sweep, describe_collection

    collection = collect_sweep(args.store, args.sweep)
    print(describe_collection(collection))
    return EXIT_OK


def _submit(args: argparse.Namespace) -> int:
    from pipeline.config import load_config
    from pipeline.submit import submit

    config = load_config(args.config, args.overrides)
    plan = submit(config, args.config, args.scheduler, store=args.store,
                  jobs_dir=args.jobs_dir, dry_run=args.dry_run, overrides=args.overrides)
    print(plan.describe())
    return EXIT_OK


def _report(args: argparse.Namespace) -> int:
    from pipeline.figures import write_report

    page = write_report(args.store, args.name, out=args.out)
    print(f"report: {page}")
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
    if config.sweep is not None:
        from pipeline.sweep import expand_sweep

        tasks = expand_sweep(config)  # validates every task's config
        print(f"  sweep {config.sweep.name}: {len(tasks)} tasks, runs {tasks[0].run} .. "
              f"{tasks[-1].run} (the estimate above is for the base config)")
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


_COMMANDS = {"sweep": _sweep, "sweep-task": _sweep_task, "collect": _collect, "submit": _submit,
             "report": _report}
