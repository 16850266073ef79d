"""Command line: argument parsing only; the work happens in :mod:`grouplevel.pipeline`."""

from __future__ import annotations

import argparse
import sys
import tempfile
from pathlib import Path

from grouplevel import __version__
from grouplevel.errors import UserError

EXIT_USER_ERROR = 2


def _parser() -> argparse.ArgumentParser:
    """The argument parser of ``grouplevel`` and its sub-commands (one builder each)."""
    p = argparse.ArgumentParser(
        prog="grouplevel",
        description="Mixed-effects group analysis of rodent fMRI contrast maps "
        "(runs nested in animals).",
    )
    p.add_argument("--version", action="version", version=f"grouplevel {__version__}")
    sub = p.add_subparsers(dest="command", required=True, metavar="COMMAND")
    _add_check_command(sub)
    _add_run_command(sub)
    _add_report_command(sub)
    _add_plan_command(sub)
    _add_table_command(sub)
    _add_example_command(sub)
    _add_demo_command(sub)
    return p


def _add_check_command(sub: argparse._SubParsersAction) -> None:
    """The ``check`` command: validate a study and print its overview."""
    c = sub.add_parser("check", help="validate a study and print its overview")
    c.add_argument("study", type=Path, help="the study's TOML file")


def _add_run_command(sub: argparse._SubParsersAction) -> None:
    """The ``run`` command: fit, correct, ask and write an output folder."""
    r = sub.add_parser("run", help="fit the group model and write maps and summary")
    r.add_argument("study", type=Path, help="the study's TOML file")
    # a string, not a Path: Path("") is the working folder, and an empty --out is refused
    r.add_argument("--out", required=True, help="output folder (a new folder of its own)")
    r.add_argument("--force", action="store_true", help="replace an existing output folder")
    r.add_argument("--quiet", action="store_true", help="print only errors and the result")
    r.add_argument(
        "--permutations",
        type=int,
        default=None,
        help="override [inference] permutations (0 = parametric only)",
    )
    r.add_argument("--seed", type=int, default=None, help="override [inference] seed")


def _add_report_command(sub: argparse._SubParsersAction) -> None:
    """The ``report`` command: re-render the report of an output folder."""
    rp = sub.add_parser(
        "report", help="re-render report.html, methods.md and tables/ of an output folder"
    )
    rp.add_argument("folder", type=Path, help="output folder of `grouplevel run`")
    rp.add_argument(
        "--title",
        default=None,
        help="a new title for the report (kept for later renderings, in report.json)",
    )


def _add_plan_command(sub: argparse._SubParsersAction) -> None:
    """The ``plan`` command: power of future designs from an output folder."""
    pl = sub.add_parser(
        "plan",
        help="power of future designs (animals x sessions x runs) from a finished output folder",
    )
    pl.add_argument("folder", type=Path, help="output folder of `grouplevel run`")
    pl.add_argument(
        "--regions",
        nargs="+",
        default=None,
        help="regions to plan for (default: the [questions] targets)",
    )
    pl.add_argument(
        "--effect",
        type=float,
        default=None,
        help="effect to detect (default: the observed one; optimistic)",
    )
    pl.add_argument(
        "--cost-animal",
        type=float,
        default=10.0,
        help="cost of one more animal (any unit; default 10)",
    )
    pl.add_argument(
        "--cost-run",
        type=float,
        default=1.0,
        help="cost of one more run of an animal (same unit; default 1)",
    )
    pl.add_argument(
        "--cost-session",
        type=float,
        default=2.0,
        help=(
            "cost of one more imaging session beyond its runs, used when the analysis "
            "fitted sessions as their own level (same unit; default 2)"
        ),
    )
    pl.add_argument(
        "--alpha",
        type=float,
        default=None,
        help="significance level (default: the study's [inference] alpha)",
    )
    pl.add_argument(
        "--target-power",
        type=float,
        default=0.8,
        help="power the cheapest design must reach (default 0.8)",
    )


def _add_table_command(sub: argparse._SubParsersAction) -> None:
    """The ``table`` command: a runs table from a BIDS-style derivatives folder."""
    t = sub.add_parser(
        "table",
        help="write a runs table from a BIDS-style derivatives folder of first-level maps",
    )
    t.add_argument("folder", type=Path, help="the derivatives folder (searched recursively)")
    t.add_argument("--out", type=Path, required=True, help="the runs table to write (.tsv)")
    t.add_argument(
        "--participants",
        type=Path,
        default=None,
        help="participants table (default: FOLDER/participants.tsv when present)",
    )
    t.add_argument(
        "--select",
        nargs="+",
        default=[],
        metavar="ENTITY=LABEL",
        help="use only maps with these entity labels, e.g. space=template",
    )
    t.add_argument("--force", action="store_true", help="replace an existing table")


def _add_example_command(sub: argparse._SubParsersAction) -> None:
    """The ``example`` command: write the invented example study."""
    e = sub.add_parser("example", help="write the invented example study into a folder")
    e.add_argument("folder", type=Path, help="folder to write the example study into")


def _add_demo_command(sub: argparse._SubParsersAction) -> None:
    """The ``demo`` command: write the example study and run it."""
    d = sub.add_parser("demo", help="write the example study and run it")
    d.add_argument(
        "--out",
        type=Path,
        default=None,
        help="folder for the example study and its results (default: temporary)",
    )
    d.add_argument("--force", action="store_true", help="replace earlier demo results")
    d.add_argument(
        "--quiet", action="store_true", help="print only errors and where the outputs are"
    )


def _log(quiet: bool):
    def log(msg: str) -> None:
        if not quiet:
            print(msg, flush=True)

    return log


def _check(args: argparse.Namespace) -> int:
    from grouplevel.cli.overview import study_overview
    from grouplevel.intake.study import load_study

    study = load_study(args.study)
    print(study_overview(study), end="")
    print("\nstudy is valid")
    return 0


def _run(args: argparse.Namespace) -> int:
    from grouplevel.pipeline import run_study

    out = run_study(
        args.study,
        args.out,
        force=args.force,
        log=None if args.quiet else _log(False),
        permutations=args.permutations,
        seed=args.seed,
    )
    print(f"outputs written to {out}")
    print(f"  report: {out / 'report.html'}")
    print(f"  figures: {out / 'figures'}  (PDF, 300 dpi PNG and caption of each)")
    return 0


def _report(args: argparse.Namespace) -> int:
    from grouplevel.outputs.folder import require_grouplevel_output
    from grouplevel.report import render_report, write_manuscript_tables, write_methods
    from grouplevel.report.render import missing_inputs

    require_grouplevel_output(args.folder)
    for problem in missing_inputs(args.folder):
        print(f"warning: {problem}", file=sys.stderr)
    write_methods(args.folder)
    tables = write_manuscript_tables(args.folder)
    report = render_report(args.folder, title=args.title)
    print(f"methods: {args.folder / 'methods.md'}")
    print(f"tables: {len(tables)} files in {args.folder / 'tables'}")
    print(f"figures: {args.folder / 'figures'}")
    print(f"report: {report}")
    return 0


def _plan(args: argparse.Namespace) -> int:
    from grouplevel.outputs.folder import require_grouplevel_output
    from grouplevel.planning.plan import design_text, plan_from_output, write_plan
    from grouplevel.report.words import count

    require_grouplevel_output(args.folder)
    plans = plan_from_output(
        args.folder,
        regions=args.regions,
        effect=args.effect,
        cost_animal=args.cost_animal,
        cost_run=args.cost_run,
        alpha=args.alpha,
        target_power=args.target_power,
        cost_session=args.cost_session,
    )
    for plan in plans:
        where = f"{plan.name}: {plan.region} ({plan.hemisphere})"
        if plan.cheapest is None:
            print(f"{where}: no design in the grid reaches power {args.target_power}")
        else:
            best = plan.cheapest
            print(
                f"{where}: cheapest design with power >= {args.target_power}: "
                f"{design_text(best, 'x')} (power {best['power']:.2f}, cost {best['cost']:g})"
            )
            if "power_one_more_session" in best:
                print(
                    f"  one more session of {count(int(best['runs']), 'run')}: power "
                    f"{best['power_one_more_session']:.2f}; the same runs added to the "
                    f"existing sessions: {best['power_same_runs_in_sessions']:.2f}"
                )
    if plans:
        print(f"caution: {plans[0].caution}")
    for path in write_plan(args.folder, plans):
        print(f"wrote {path}")
    from grouplevel.report import render_report

    print(f"report (with a planning section): {render_report(args.folder)}")
    return 0


def _table(args: argparse.Namespace) -> int:
    from grouplevel.intake.bids import derivatives_table, write_table

    select = {}
    for item in args.select:
        key, sep, value = item.partition("=")
        if not sep or not key or not value:
            raise UserError(f"--select {item!r}: write ENTITY=LABEL, e.g. space=template")
        select[key] = value
    out = args.out.expanduser().resolve()
    if out.exists() and not args.force:
        raise UserError(f"{out}: exists; choose another file or add --force to replace it")
    if out.suffix.lower() != ".tsv":
        raise UserError(f"{out}: the runs table is tab-separated; give a name ending in .tsv")
    found = derivatives_table(args.folder, participants=args.participants, select=select)
    path = write_table(found, out)
    table = found.table
    covariates = [
        c
        for c in table.columns
        if c not in ("animal", "session", "run", "condition", "effect")
        and c not in ("variance", "se")
    ]
    print(f"wrote {path}: {len(table)} runs")
    print(f"  animals     {table['animal'].nunique()}: {', '.join(table['animal'].unique())}")
    sessions = sorted(set(table["session"]) - {""})
    if sessions:
        print(f"  sessions    {', '.join(sessions)}")
    conditions = sorted(set(table["condition"]) - {""})
    if conditions:
        print(f"  conditions  {', '.join(conditions)}")
    kind = "variance" if "variance" in table else "se" if "se" in table else "none"
    print(f"  variances   {kind}")
    if covariates:
        print(f"  covariates  {', '.join(covariates)}")
    for line in found.skipped:
        print(f"  skipped     {line}")
    print(f'next: name it in the study file ([study] table = "{path.name}") and run check')
    return 0


def _example(args: argparse.Namespace) -> int:
    from grouplevel.example import write_example

    toml = write_example(args.folder)  # refuses a folder that holds anything else
    print(f"example study written to {toml.parent}")
    print(f"next: grouplevel check {toml}")
    return 0


def _demo(args: argparse.Namespace) -> int:
    from grouplevel.example import write_example
    from grouplevel.pipeline import check_output_folder, run_study

    base = args.out if args.out is not None else Path(tempfile.mkdtemp(prefix="grouplevel-demo-"))
    base = base.expanduser().resolve()
    results = base / "results"
    check_output_folder(results, args.force)
    log = _log(args.quiet)
    toml = write_example(base / "example_study")
    log(f"example study written to {toml.parent}")
    out = run_study(toml, results, force=args.force, log=None if args.quiet else log)
    print(f"demo finished: outputs in {out}")
    print(f"  report:  {out / 'report.html'}  (open it in a browser)")
    print(f"  figures: {out / 'figures'}  (each as PDF, 300 dpi PNG and caption)")
    print(f"  summary: {out / 'summary.json'}")
    return 0


_COMMANDS = {
    "check": _check,
    "run": _run,
    "report": _report,
    "plan": _plan,
    "table": _table,
    "example": _example,
    "demo": _demo,
}


def main(argv: list[str] | None = None) -> int:
    """Entry point of the ``grouplevel`` console script."""
    args = _parser().parse_args(argv)
    try:
        return _COMMANDS[args.command](args)
    except UserError as exc:
        text = str(exc)
        first, _, rest = text.partition("\n")
        print(f"error: {first}", file=sys.stderr)
        if rest:
            print(rest, file=sys.stderr)
        return EXIT_USER_ERROR
    except KeyboardInterrupt:
        print("interrupted", file=sys.stderr)
        return 130
    except BrokenPipeError:
        # the reader of our output went away (e.g. `grouplevel plan DIR | head`): stop
        # quietly; point stdout at devnull so that the interpreter's final flush is silent
        import os

        os.dup2(os.open(os.devnull, os.O_WRONLY), sys.stdout.fileno())
        return 0


if __name__ == "__main__":
    sys.exit(main())
