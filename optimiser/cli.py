"""The ``rqnet`` command.

Each subcommand is a :class:`Command`: a name, a one-line help, a description,
``add_arguments(parser)`` and ``run(args) -> int``. They are registered in :data:`COMMANDS`. A module
elsewhere in ``optimiser`` adds its own subcommand with one line in that list::

    module_command("simulate", "optimiser.simulate")

where the module defines ``COMMAND_HELP`` (one line), ``COMMAND_DESCRIPTION`` (a paragraph),
``add_arguments(parser)`` and ``run(args) -> int``. Shared helpers for such modules: :func:`progress_printer`
and the ``--quiet`` flag every subcommand gets.

Exit codes: 0 done; 1 an unexpected error (a bug; traceback on stderr, nothing written); 2 the case or the
command line is wrong (message on stderr, nothing written); 3 the case is valid but could not be planned
(infeasible or a numerical failure).
"""

from __future__ import annotations

import argparse
import importlib
import sys
import time
import traceback
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from importlib import metadata
from pathlib import Path

from optimiser.errors import CaseError, InfeasibleError, OutputError, SolverError

__all__ = ["Command", "COMMANDS", "module_command", "main", "progress_printer"]

EXIT_OK = 0
EXIT_BAD_INPUT = 2
EXIT_CANNOT_PLAN = 3
EXIT_BUG = 1


@dataclass(frozen=True)
class Command:
    """One ``rqnet`` subcommand."""

    name: str
    help: str
    description: str
    add_arguments: Callable[[argparse.ArgumentParser], None]
    run: Callable[[argparse.Namespace], int]


def module_command(name: str, module: str) -> Callable[[], Command]:
    """A subcommand defined in another module (imported only when the parser is built)."""

    def load() -> Command:
        mod = importlib.import_module(module)
        return Command(name, mod.COMMAND_HELP, mod.COMMAND_DESCRIPTION, mod.add_arguments, mod.run)

    return load


def progress_printer(args: argparse.Namespace) -> Callable[[str], None]:
    """A function printing progress lines (with elapsed seconds) on stderr, silent under ``--quiet``."""
    start = time.perf_counter()

    def say(text: str) -> None:
        if not getattr(args, "quiet", False):
            print(f"rqnet [{time.perf_counter() - start:6.1f} s] {text}", file=sys.stderr, flush=True)

    return say


# --------------------------------------------------------------------------------------------- plan


def _case_argument(parser: argparse.ArgumentParser) -> None:
    parser.add_argument(
        "case",
        metavar="CASE",
        type=Path,
        help="the case folder (case.toml, sites.csv, suppliers.csv, items.csv, demand.csv or "
        "history.csv, and optionally stocking.csv and policies.csv)",
    )


def _out_argument(parser: argparse.ArgumentParser) -> None:
    parser.add_argument(
        "--out",
        metavar="DIR",
        type=Path,
        required=True,
        help="folder for the results; created, or replaced if it holds earlier rqnet results",
    )
    parser.add_argument("--no-plots", action="store_true", help="skip the PNG charts")


def _plan_arguments(parser: argparse.ArgumentParser) -> None:
    _case_argument(parser)
    _out_argument(parser)
    parser.add_argument(
        "--no-grouping",
        action="store_true",
        help="skip the section on ordering a supplier's items together (groups.csv, families.csv)",
    )


def _run_plan(args: argparse.Namespace) -> int:
    from optimiser.case import load_case

    say = progress_printer(args)
    say(f"reading case {args.case}")
    case = load_case(args.case)
    from optimiser.plan import plan_case
    from optimiser.report import write_outputs

    result = plan_case(case, progress=say, grouping=not getattr(args, "no_grouping", False))
    say(f"writing results to {args.out}")
    write_outputs(
        result, args.out, case_name=case.settings.name, case_path=str(args.case), plots=not args.no_plots
    )
    _print_totals(result, args.out)
    say("done")
    return EXIT_OK


def _print_totals(result, out: Path) -> None:  # noqa: ANN001 - PlanResult, imported lazily
    cur = f" {result.settings.currency}" if result.settings.currency else ""
    net = result.network
    print(
        f"{result.command}: {net['item_sites']} item-sites at {net['sites']} site(s); "
        f"total cost {net['total_cost']:,.0f}{cur} a year, customer fill rate "
        f"{100 * net['customer_fill_rate']:.1f} %".replace("nan %", "n/a")
    )
    if result.comparison is not None:
        row = result.comparison.set_index("site").loc["(network)"]
        print(
            f"today's policies on the same item-sites: {row['current_total_cost']:,.0f}{cur} a year; "
            f"recommended {row['recommended_total_cost']:,.0f}{cur}"
        )
    section = getattr(result, "grouping", None)
    if section is not None and section.result is not None:
        tot = section.totals()
        print(
            f"ordering together: {tot['families']} supplier famil{'y' if tot['families'] == 1 else 'ies'}, "
            f"grouped {tot['grouped_cost']:,.0f}{cur} a year against {tot['independent_cost']:,.0f}{cur} "
            f"ordering each item alone (saving {tot['savings']:,.0f}{cur})"
        )
    for warning in result.warnings:
        print(f"warning: {warning}")
    print(f"results in {out}")


PLAN = Command(
    "plan",
    "recommend a reorder point and order quantity for every item at every site",
    "Read the case folder, check it, and work out for every item each site stocks the reorder point (order "
    "when stock on hand plus on order, less backorders, falls to it) and the order quantity that balance "
    "ordering, holding "
    "and shortage costs, or meet the service target set in case.toml. Results go to the --out folder: "
    "policies.csv for the whole network, a folder per site with its policies and a readable summary, "
    "summary.json with the totals, and charts. If the case has policies.csv (today's policies), their cost "
    "and service are shown beside the recommended ones. Unless --no-grouping, each site's items from one "
    "supplier are also grouped on a common order cycle to share the supplier's order cost (groups.csv, "
    "families.csv, and an 'Ordering together' section in the site's summary).",
    _plan_arguments,
    _run_plan,
)


# --------------------------------------------------------------------------------------------- check


def _check_arguments(parser: argparse.ArgumentParser) -> None:
    _case_argument(parser)


def _run_check(args: argparse.Namespace) -> int:
    from optimiser.case import ancestors, load_case
    from optimiser.itemsites import build_itemsites, distribution_names

    case = load_case(args.case)
    itemsites = build_itemsites(case)
    s = case.settings
    lines = [
        f"case: {s.name} ({args.case})",
        f"currency {s.currency or '(none given)'}; {s.days_per_year:g} days a year; holding cost "
        f"{100 * s.holding_rate:g} % of unit cost a year where an item gives none",
        f"service rule: {s.mode}"
        + (f", target {s.target:g}" if s.target is not None else "")
        + (
            f", backorder cost {'per unit short' if s.backorder_basis == 'per_unit' else 'per unit per year'}"
            if s.mode == "cost"
            else ""
        )
        + f"; default distribution {s.distribution}",
    ]
    upstream = dict(zip(case.sites["site"], case.sites["upstream"], strict=True))
    roots = [site for site, up in upstream.items() if not up]
    lines.append(
        f"sites: {len(upstream)} ({len(roots)} supplied by suppliers, {len(upstream) - len(roots)} by "
        "another site)"
    )
    for site in upstream:
        depth = len(ancestors(upstream, site))
        feed = "suppliers" if not upstream[site] else f"{upstream[site]}"
        lines.append(f"  {'  ' * depth}{site}  <- {feed}")
    lines.append(f"suppliers: {len(case.suppliers)}; items: {len(case.items)}")
    demand = case.demand
    zero = int((demand["daily_mean"] == 0).sum())
    if case.demand_source == "history.csv":
        classes = demand["demand_class"].value_counts().to_dict()
        shown = ", ".join(f"{k} {v}" for k, v in classes.items())
        lines.append(
            f"demand: estimated from history.csv over {int(demand['history_days'].iloc[0])} days for "
            f"{len(demand)} site-item series ({shown})"
        )
    else:
        lines.append(f"demand: demand.csv, {len(demand)} site-item rows ({zero} with zero demand)")
    if case.stocking is None:
        lines.append(
            "stocking: no stocking.csv; every item with demand at a site is stocked there and at every "
            "site above it"
        )
    else:
        lines.append(f"stocking: stocking.csv, {len(case.stocking)} rows")
    lines.append(
        "today's policies: "
        + ("none" if case.policies is None else f"policies.csv, {len(case.policies)} rows")
    )
    dist = distribution_names(itemsites["distribution"].to_numpy())
    counts = {
        name: int((dist == name).sum()) for name in ("normal", "poisson", "negbin") if (dist == name).any()
    }
    lines.append(
        f"item-sites to plan: {len(itemsites)} (" + ", ".join(f"{k} {v}" for k, v in counts.items()) + ")"
    )
    for warning in case.warnings:
        lines.append(f"warning: {warning}")
    lines.append("the case is valid")
    print("\n".join(lines))
    return EXIT_OK


CHECK = Command(
    "check",
    "check a case folder and summarise what was read, without planning",
    "Read every file of the case folder and check it: required files and columns, numbers where numbers "
    "belong, no unknown sites, items or suppliers, no duplicates, no loops between sites, targets between 0 "
    "and 1. The first problem found is reported with its file, row and column. When all is well, print a "
    "summary of what was read. Nothing is written.",
    _check_arguments,
    _run_check,
)


# --------------------------------------------------------------------------------------------- evaluate


def _evaluate_arguments(parser: argparse.ArgumentParser) -> None:
    _case_argument(parser)
    parser.add_argument(
        "--policies",
        metavar="FILE",
        type=Path,
        required=True,
        help="CSV file with columns site, item, reorder_point, order_quantity: one row for every "
        "item each site stocks (a policies.csv written by 'rqnet plan' works as it is)",
    )
    _out_argument(parser)


def _run_evaluate(args: argparse.Namespace) -> int:
    from optimiser.case import load_case, load_policies_for_case

    say = progress_printer(args)
    say(f"reading case {args.case}")
    case = load_case(args.case)
    say(f"reading policies {args.policies}")
    policies = load_policies_for_case(case, args.policies)
    from optimiser.plan import evaluate_case
    from optimiser.report import write_outputs

    result = evaluate_case(case, policies, label=args.policies.name, progress=say)
    say(f"writing results to {args.out}")
    write_outputs(
        result, args.out, case_name=case.settings.name, case_path=str(args.case), plots=not args.no_plots
    )
    _print_totals(result, args.out)
    say("done")
    return EXIT_OK


EVALUATE = Command(
    "evaluate",
    "work out the cost and service of given reorder points and order quantities",
    "Take the reorder point and order quantity of every item at every site from --policies (for example "
    "the ones in use today, or a plan edited by hand) and work out, without changing them, the stock, "
    "service and annual costs they give. Results go to the --out folder in the same layout as 'rqnet plan'.",
    _evaluate_arguments,
    _run_evaluate,
)


# --------------------------------------------------------------------------------------------- registry

#: every subcommand, in the order ``rqnet --help`` lists them; entries are Commands or loaders of one.
COMMANDS: list[Command | Callable[[], Command]] = [
    PLAN,
    CHECK,
    EVALUATE,
    module_command("simulate", "optimiser.simulate"),
    module_command("group", "optimiser.grouping"),
]


def build_parser() -> argparse.ArgumentParser:
    """The argument parser with every registered subcommand."""
    parser = argparse.ArgumentParser(
        prog="rqnet",
        description="Reorder points and order quantities for every item at every site of a network of a "
        "central warehouse and the branches it supplies. Start with 'rqnet check CASE', then "
        "'rqnet plan CASE --out DIR'. 'rqnet COMMAND --help' explains each command.",
    )
    try:
        version = metadata.version("rqnet")
    except metadata.PackageNotFoundError:
        version = "unknown"
    parser.add_argument("--version", action="version", version=f"rqnet {version}")
    common = argparse.ArgumentParser(add_help=False)
    common.add_argument("-q", "--quiet", action="store_true", help="no progress lines on stderr")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND", required=True)
    for entry in COMMANDS:
        command = entry if isinstance(entry, Command) else entry()
        p = sub.add_parser(command.name, help=command.help, description=command.description, parents=[common])
        command.add_arguments(p)
        p.set_defaults(_run=command.run)
    return parser


def main(argv: Sequence[str] | None = None) -> int:
    """Run ``rqnet`` with ``argv`` (default: the command line); returns the exit code."""
    parser = build_parser()
    args = parser.parse_args(argv)
    try:
        return int(args._run(args))
    except CaseError as exc:
        print(f"rqnet: the case has a problem: {exc}", file=sys.stderr)
        print("rqnet: nothing was written", file=sys.stderr)
        return EXIT_BAD_INPUT
    except OutputError as exc:
        print(f"rqnet: {exc}", file=sys.stderr)
        print("rqnet: nothing was written", file=sys.stderr)
        return EXIT_BAD_INPUT
    except (InfeasibleError, SolverError) as exc:
        print(f"rqnet: could not plan: {exc}", file=sys.stderr)
        print("rqnet: nothing was written", file=sys.stderr)
        return EXIT_CANNOT_PLAN
    except Exception:  # an unexpected failure is a bug: show where, keep the outputs untouched
        traceback.print_exc()
        print(
            "rqnet: unexpected error (please report it with the lines above); nothing was written",
            file=sys.stderr,
        )
        return EXIT_BUG


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
