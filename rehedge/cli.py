"""The `rehedge` command line: parses arguments and calls library functions, nothing more."""

from __future__ import annotations

import json
import subprocess
import sys
from contextlib import contextmanager
from dataclasses import dataclass
from pathlib import Path

import typer
from rich import box
from rich.console import Console
from rich.measure import Measurement
from rich.progress import BarColumn, MofNCompleteColumn, Progress, TextColumn, TimeElapsedColumn, TimeRemainingColumn
from rich.table import Table
from typer.core import TyperGroup

from rehedge.errors import UserError, one_line
from rehedge.formats import (
    CAUTION,
    ce_caution,
    format_count,
    format_interval,
    format_money,
    heldout_text,
    metric_columns,
    money_formatter,
    tail_caution,
)

# Library modules are imported inside the commands that use them: `rehedge advise` answers from a
# hedge table with numpy alone, without starting scikit-learn, pandas, matplotlib or gymnasium.


class _Commands(TyperGroup):
    """The command group: an error a user can cause (rehedge.errors.UserError: config, run folder,
    hedge table, CSV) ends any command in one line on stderr and exit code 2; anything else is a bug,
    which ends in one line naming the crash log that holds its traceback, and exit code 3."""

    def invoke(self, ctx):
        try:
            return super().invoke(ctx)
        except UserError as error:
            fail(str(error))
        except (typer.Exit, typer.Abort, typer.TyperException):  # exits and usage errors: main() prints them
            raise
        except Exception as error:  # noqa: BLE001 - a bug: the user sees one line, the log holds the stack
            if _input_range_error(error):  # the input's fault, found where the work is done
                fail(str(error))
            from rehedge.crash import write_crash_log

            log = write_crash_log(error, sys.argv)
            what = "ran out of memory" if isinstance(error, MemoryError) else "internal error"
            fail(f"{what} ({type(error).__name__}: {one_line(str(error))[:200]}); this is a fault in rehedge, not "
                 f"in your input: the traceback is in {log}; please report it with the command", INTERNAL_ERROR)


# Errors of the lower layers that say the input is out of a method's range, in one line naming its keys:
# (module, class), looked up only once the module is loaded, so that commands that never simulate or
# train do not import them.
_INPUT_RANGE_ERRORS = (("hedge_env.market", "ModelRangeError"), ("hedge_env.model_pricing", "MarkAccuracyError"),
                        ("agents.certainty", "ExpansionRangeError"))


def _input_range_error(error: Exception) -> bool:
    return any(isinstance(error, getattr(sys.modules[module], name)) for module, name in _INPUT_RANGE_ERRORS
               if module in sys.modules)


app = typer.Typer(
    cls=_Commands,
    name="rehedge",
    help="Train, compare and export option-hedging policies under trading costs, impact and financing.",
    no_args_is_help=True,
    # Plain help text: option types as click names them (no <bool> tags), and brackets such as
    # [sweep] shown as written, not read as markup.
    rich_markup_mode=None,
    add_completion=False,
    pretty_exceptions_enable=False,
)
# Not a terminal (a file, a pipe): tables up to 160 columns, and prose is never broken mid-sentence.
console = Console(width=None if sys.stdout.isatty() else 160, soft_wrap=not sys.stdout.isatty())
errors = Console(stderr=True, soft_wrap=True)


INTERRUPTED = 130  # exit code of a command stopped by Ctrl-C (128 + SIGINT)
INTERNAL_ERROR = 3  # exit code of a fault in rehedge itself (2 is an error in the user's input)


# `advise` on a state outside the training range of the table's policy: the advice is printed, and the
# exit code tells an automated caller not to act on it unseen.
OFF_MAP = 4


def fail(message: str, code: int = 2) -> None:
    """One line on stderr and a non-zero exit: for errors a user can cause."""
    errors.print(f"error: {message}", markup=False, highlight=False)
    raise typer.Exit(code)


@contextmanager
def _progress(quiet: bool):
    """A rich progress bar on stderr (or nothing with --quiet); yields ``start(label, total) -> advance``."""
    if quiet:
        yield lambda label, total: (lambda n: None)
        return
    # Started at the first stage, so that an error before any (a missing file) prints no blank line.
    shown: list[Progress] = []

    def start(label: str, total: int):
        if not shown:
            shown.append(Progress(TextColumn("{task.description}"), BarColumn(), MofNCompleteColumn(),
                                  TimeElapsedColumn(), TimeRemainingColumn(), console=errors, transient=True))
            shown[0].start()
        task = shown[0].add_task(label, total=total)
        return lambda n: shown[0].advance(task, n)

    try:
        yield start
    finally:
        if shown:
            shown[0].stop()


def _print_split(title: str | None, lead: list[tuple[str, list[str], str]], rest: list[tuple[str, list[str]]]) -> None:
    """Columns ``rest`` (header, cells; right-justified) beside the ``lead`` columns (header, cells,
    justification), split into as many tables as the console's width needs, each repeating the lead
    columns: no number and no name is ever cut."""

    def table_of(group) -> Table:
        table = Table(box=box.SIMPLE_HEAD, pad_edge=False)
        for header, _, justify in lead:
            table.add_column(header, justify=justify, no_wrap=True)
        for header, _ in group:
            table.add_column(header, justify="right", no_wrap=True)
        for row in zip(*(cells for _, cells, _ in lead), *(cells for _, cells in group)):
            table.add_row(*row)
        return table

    groups = [[]]
    for column in rest:
        wider = table_of(groups[-1] + [column])
        natural = Measurement.get(console, console.options.update_width(10**6), wider).maximum
        if groups[-1] and natural > console.width:
            groups.append([])
        groups[-1].append(column)
    if title:
        console.print(title, highlight=False)
    for group in groups:
        console.print(table_of(group))


def _print_table(title: str, records: list[dict], wide: bool = False) -> None:
    """The ranked table: the terminal's columns (every column with ``wide``), split as the width needs."""
    columns = [c for c in metric_columns(records[0]) if wide or c.on_terminal]
    labels = [r["name"] if r["kind"] in ("", r["name"], "table") else f"{r['name']} ({r['kind']})" for r in records]
    cells = []
    for column in columns:
        values = [r[column.key] for r in records]
        cells.append((column.short, [column.formatter(values)(v) for v in values]))
    _print_split(title, [("policy", labels, "left")], cells)


def _print_version(asked: bool) -> None:
    if asked:
        from importlib.metadata import version

        console.print(f"rehedge {version('rehedge')}", highlight=False)
        raise typer.Exit(0)


@app.callback()
def _options(version: bool = typer.Option(False, "--version", is_eager=True, callback=_print_version,
                                          help="Print the version and exit.")) -> None:
    """Train, compare and export option-hedging policies under trading costs, impact and financing."""


@app.command("check-config")
def check_config(config: Path = typer.Argument(..., help="TOML config file.")) -> None:
    """Validate a config file; print what it describes, or the first error in one line."""
    from rehedge.config import load_variants

    variants = load_variants(config)
    cfg = variants[0]
    console.print(
        f"{config}: ok: {len(cfg.book.options)} option(s), {cfg.notional_shares:g} notional shares, "
        f"{cfg.schedule.steps} rehedges over {cfg.horizon_days:g} days, "
        f"{len(cfg.baselines)} baseline(s), {len(cfg.agents)} agent(s)"
        + (f", {len(variants)} sweep variants" if len(variants) > 1 else ""),
        highlight=False,
    )
    if cfg.market.model == "historical":
        from rehedge.build import build_markets, describe_markets

        markets = describe_markets(*build_markets(cfg))
        for role, facts in markets.items():
            count = f"{facts['windows']} windows" if "windows" in facts else f"{cfg.data.train_paths} bootstrap paths"
            console.print(f"  {role}: {facts['first_date']} .. {facts['last_date']} ({facts['rows']} trading days, "
                          f"rows {facts['first_row']}-{facts['last_row']}), {count}", highlight=False)


def _records_out(cfg, n_paths: int, seed: int, evaluation, tuning: dict, as_json: bool, run_dir=None,
                 wide: bool = False) -> None:
    records = evaluation.to_records()
    if as_json:
        out = {
            "config": cfg.name,
            "heldout_paths": n_paths,
            "heldout_seed": seed,
            "reference_policy": evaluation.reference,
            "bootstrap": {"samples": evaluation.bootstrap_samples, "seed": evaluation.bootstrap_seed},
            "tuned": {name: {r.parameter: r.value, "train_objective": r.objective} for name, r in tuning.items()},
            "policies": records,
            "run": None if run_dir is None else str(run_dir),
            "caution": CAUTION,
        }
        sys.stdout.write(json.dumps(out, indent=2) + "\n")
        return
    fixed = cfg.market.model == "historical"
    _print_table(
        f"{cfg.name}: {heldout_text(n_paths, cfg.data.heldout_paths, seed, fixed)}; ranked by objective, higher "
        f"is better; money in {cfg.currency}, costs per path" + (", turnover in notionals" if wide else ""),
        records, wide,
    )
    for caution in (tail_caution(n_paths), ce_caution(records)):
        if caution:
            console.print(caution, highlight=False)
    reference = evaluation.reference
    if reference in evaluation.results:
        objective = evaluation.results[reference].objective.form.score_name
        console.print(f"{objective} (higher is better) difference from {reference}, paired over paths, bootstrap 95% CI "
                      f"({evaluation.bootstrap_samples} resamples, seed {evaluation.bootstrap_seed}):", highlight=False)
        for record in records:
            if record["name"] != reference:
                v = record["vs_reference"]
                verdict = "better" if v["ci_low"] > 0 else "worse" if v["ci_high"] < 0 else "not distinguishable"
                console.print(f"  {record['name']:<18} {format_interval(v['mean'], v['ci_low'], v['ci_high'])}"
                              f"  {verdict}", highlight=False)
    for name, result in tuning.items():
        console.print(f"tuned on training paths: {name}.{result.parameter} = {result.value:.6g}", highlight=False)
    if run_dir is not None:
        console.print(f"run folder: {run_dir}", highlight=False)
    console.print(CAUTION, style="dim", highlight=False)


def _heldout(cfg, market, paths: int | None, seed: int | None) -> tuple[int, int]:
    """Held-out path count (a history's windows cap it) and seed."""
    from rehedge.build import path_count

    return path_count(market, paths or cfg.data.heldout_paths), cfg.data.heldout_seed if seed is None else seed


@app.command()
def evaluate(
    source: Path = typer.Argument(..., help="TOML config file, or a run folder written by `rehedge run`/`train` "
                                  "(`last`: the newest under runs/)."),
    paths: int = typer.Option(None, "--paths", min=1, help="Held-out paths (default: data.heldout_paths)."),
    seed: int = typer.Option(None, "--seed", min=0, help="Held-out seed (default: data.heldout_seed)."),
    as_json: bool = typer.Option(False, "--json", help="Print one JSON object instead of a table."),
    wide: bool = typer.Option(False, "--wide", help="Every measure (VaR, entropic risk, turnover, quotes), "
                                                     "in as many tables as the width needs."),
    quiet: bool = typer.Option(False, "--quiet", help="No progress bars."),
    save: bool = typer.Option(False, "--save", help="Save the scores into the run folder (metrics and per-path "
                              "results, as `rehedge run` writes them), ready for `rehedge report`."),
    threads: int = typer.Option(None, "--threads", min=1, help="BLAS and OpenMP threads (default: compute.threads, 1)."),
    tables: list[Path] = typer.Option(
        None, "--table", metavar="TABLE", help="Also score this hedge table (folder or table.json; repeatable); it must be "
                              "exported for the same book, reference spot and schedule."),
) -> None:
    """Score every baseline of a config (or every policy of a run folder) on held-out paths, ranked by objective."""
    from rehedge.run_folder import resolve_run, save_scores

    source = resolve_run(source)
    if not source.exists():
        fail(f"{source}: no such config file or run folder")
    if save and not source.is_dir():
        fail(f"--save: {source} is not a run folder (the scores are saved into the run folder they score)")
    scored = _score(source, paths, seed, quiet, tables or (), threads)
    _records_out(scored.cfg, scored.n_paths, scored.seed, scored.evaluation, scored.tuning, as_json, wide=wide)
    _print_off_map(scored)
    if save:
        written = save_scores(scored.evaluation, source)
        errors.print(f"saved {', '.join(written)} into {source}; `rehedge report {source}` draws its report",
                     markup=False, highlight=False)


OFF_MAP_PATHS = 2_000  # held-out paths on which a table's decisions off its training range are counted


def _print_off_map(scored) -> None:
    """For each table scored, the share of its decisions on the first held-out paths that lie outside
    the training range it records (on stderr: the scores on stdout stay one table or one JSON object)."""
    from rehedge.tables.export import off_map_share

    n_paths = min(OFF_MAP_PATHS, scored.n_paths)
    for name, table in scored.tables.items():
        share = off_map_share(table, scored.problem, scored.market, n_paths, scored.seed)
        what = ("records no training range" if share != share else
                f"decides {share:.1%} of the time outside its training range")
        errors.print(f"{name}: on the first {n_paths:,} held-out paths, {what}", markup=False, highlight=False)


@dataclass(frozen=True)
class _Scored:
    cfg: object
    evaluation: object
    tuning: dict
    n_paths: int
    seed: int
    problem: object
    market: object
    tables: dict


def _score(source: Path, paths: int | None, seed: int | None, quiet: bool, tables=(), threads: int | None = None):
    """Policies of a config or run folder (and hedge tables) on its held-out paths, with CIs and quotes."""
    from threadpoolctl import threadpool_limits

    from rehedge.compare import evaluate_with_quotes
    from rehedge.tables.reader import tables_as_policies

    with _progress(quiet) as start:
        # Loading and tuning run before the config's own thread count is read: one thread, or --threads.
        with threadpool_limits(limits=threads or 1):
            cfg, problem, market, policies, tuning, kinds = _policies_of(source, start)
        loaded, table_kinds = tables_as_policies(tables, problem)
        policies, kinds = {**policies, **loaded}, {**kinds, **table_kinds}
        n_paths, seed = _heldout(cfg, market, paths, seed)
        with threadpool_limits(limits=threads or cfg.compute.threads):
            evaluation = evaluate_with_quotes(
                problem, policies, market, n_paths, seed, kinds=kinds, chunk_paths=cfg.data.chunk_paths,
                progress=start("hedging held-out paths (both sides of the book)", n_paths),
                reference=_reference(cfg, policies), bootstrap_samples=cfg.report.bootstrap_samples,
            )
    return _Scored(cfg, evaluation, tuning, n_paths, seed, problem, market, loaded)


def _reference(cfg, policies) -> str | None:
    return cfg.report.reference_policy if cfg.report.reference_policy in policies else None


def _train(cfg, config: Path, runs_dir: Path, quiet: bool, threads: int | None):
    from rehedge.run_folder import write_run
    from rehedge.training import train

    with _progress(quiet) as start:
        training = train(cfg, start, threads)
    return training, write_run(training, config.read_text(), runs_dir)


@app.command("train")
def train_command(
    config: Path = typer.Argument(..., help="TOML config file."),
    runs_dir: Path = typer.Option(Path("runs"), "--runs-dir", help="Where run folders are written."),
    quiet: bool = typer.Option(False, "--quiet", help="No progress bars."),
    threads: int = typer.Option(None, "--threads", min=1, help="BLAS and OpenMP threads (default: compute.threads, 1)."),
) -> None:
    """Tune the baselines and fit every agent of CONFIG on its training paths; write a run folder
    (one per variant when the config has a sweep)."""
    from rehedge.config import load_variants

    for cfg in load_variants(config):
        training, run_dir = _train(cfg, config, runs_dir, quiet, threads)
        for line in training.log:
            console.print(line, highlight=False)
        console.print(f"run folder: {run_dir}", highlight=False)


@app.command()
def run(
    config: Path = typer.Argument(..., help="TOML config file."),
    paths: int = typer.Option(None, "--paths", min=1, help="Held-out paths (default: data.heldout_paths)."),
    runs_dir: Path = typer.Option(Path("runs"), "--runs-dir", help="Where run folders are written."),
    as_json: bool = typer.Option(False, "--json", help="Print one JSON object instead of a table."),
    wide: bool = typer.Option(False, "--wide", help="Every measure (VaR, entropic risk, turnover, quotes), "
                                                     "in as many tables as the width needs."),
    quiet: bool = typer.Option(False, "--quiet", help="No progress bars."),
    threads: int = typer.Option(None, "--threads", min=1, help="BLAS and OpenMP threads (default: compute.threads, 1)."),
) -> None:
    """The main job: train every agent, then score agents and baselines on the same held-out paths
    (each variant in turn when the config has a sweep)."""
    from rehedge.config import load_variants
    from rehedge.runner import report_variants, run_config

    run_dirs = []
    variants = load_variants(config)
    sweep = len(variants) > 1
    for cfg in variants:
        with _progress(quiet) as start:
            outcome = run_config(cfg, config.read_text(), runs_dir, paths, start, report=not sweep, threads=threads)
        run_dirs.append(outcome.run_dir)
        _records_out(cfg, outcome.heldout_paths, outcome.heldout_seed, outcome.evaluation,
                     outcome.training.tuning, as_json, outcome.run_dir, wide)
    if sweep:
        report_variants(run_dirs)


def _print_quote_table(rows: list[dict]) -> None:
    """Bid, ask, their spreads in volatility points and the CVaR quotes per policy, split as the width needs."""
    # The risk of an unhedged book is no basis for a hedged quote: its row shows no numbers.
    unhedged = [r["kind"] == "no_hedge" for r in rows]

    def cells(format_one) -> list[str]:
        return ["-" if skip else format_one(r) for r, skip in zip(rows, unhedged)]

    def money(key: str) -> list[str]:  # one number of decimals per column
        shown = money_formatter([r[key] for r, skip in zip(rows, unhedged) if not skip])
        return cells(lambda r: shown(r[key]))

    _print_split(None, [("policy", [r["name"] + (" *" if skip else "") for r, skip in zip(rows, unhedged)], "left")], [
        ("bid", money("quote_bid")),
        ("ask", money("quote_ask")),
        ("spread bid / ask (vol points)",
         cells(lambda r: f"{format_count(r['spread_bid_vol_points'])} / {format_count(r['spread_ask_vol_points'])}")),
        ("CVaR-95 bid", money("cvar_bid")),
        ("CVaR-95 ask", money("cvar_ask")),
    ])


@app.command()
def quote(
    source: Path = typer.Argument(..., help="TOML config file, or a run folder."),
    paths: int = typer.Option(None, "--paths", min=1, help="Held-out paths (default: data.heldout_paths)."),
    tables: list[Path] = typer.Option(
        None, "--table", metavar="TABLE", help="Also quote with this hedge table (folder or table.json; repeatable)."),
    as_json: bool = typer.Option(False, "--json", help="Print one JSON object instead of a table."),
    quiet: bool = typer.Option(False, "--quiet", help="No progress bars."),
    threads: int = typer.Option(None, "--threads", min=1, help="BLAS and OpenMP threads (default: compute.threads, 1)."),
) -> None:
    """Bid and ask per policy: the premium the kept risk justifies (indifference under the objective, and CVaR 95)."""

    scored = _score(source, paths, None, quiet, tables or (), threads)
    cfg, evaluation, n_paths, seed = scored.cfg, scored.evaluation, scored.n_paths, scored.seed

    rows = evaluation.to_records()
    if as_json:
        keys = ("mark", "quote_bid", "quote_ask", "cvar_bid", "cvar_ask", "spread_bid", "spread_ask",
                "spread_bid_vol_points", "spread_ask_vol_points", "vega_per_vol_point")
        out = {"config": cfg.name, "objective_kind": cfg.objective.kind, "heldout_paths": n_paths, "heldout_seed": seed,
               "quotes": [{"name": r["name"], "kind": r["kind"], **{k: r[k] for k in keys}} for r in rows],
               "caution": CAUTION}
        sys.stdout.write(json.dumps(out, indent=2) + "\n")
        return
    console.print(f"{cfg.name}: premiums in {cfg.currency} for the whole book, {n_paths:,} held-out paths; Black-Scholes "
                  f"mark {format_money(rows[0]['mark'])}; book vega {format_money(rows[0]['vega_per_vol_point'])} "
                  "per volatility point", highlight=False)
    _print_quote_table(rows)
    # The mark is the configured position's liability: positive when the desk has sold value.
    sold = rows[0]["mark"] > 0
    console.print(("ask: the premium to receive for selling this book as configured" if sold else
                   "ask: the premium for taking on this book as configured (negative: paid)")
                  + " and hedging it with the policy, at which the desk is indifferent under its "
                  + next(iter(evaluation.results.values())).objective.form.quote_title
                  + ("; bid: the premium to pay for buying it back" if sold else "; bid: the same")
                  + " (the opposite book, the policy mirrored). CVaR-95: the mark plus (ask) or minus (bid) the "
                  "95% CVaR of the hedged loss.", highlight=False)
    if any(r["kind"] == "no_hedge" for r in rows):
        console.print("* not hedging: its premiums price the whole unhedged risk and mean nothing as a quote "
                      "(see `rehedge evaluate`).", highlight=False)
    console.print(CAUTION, style="dim", highlight=False)


@app.command()
def report(run_dir: Path = typer.Argument(..., help="Run folder written by `rehedge run` (`last`: the newest "
                                         "under runs/).")) -> None:
    """Rebuild report.html of a run folder from its saved results."""
    from rehedge.report import build_report
    from rehedge.report.scored import recorded_siblings
    from rehedge.run_folder import resolve_run

    run_dir = resolve_run(run_dir)
    path = build_report(run_dir, recorded_siblings(run_dir))
    console.print(f"report: {path} ({path.stat().st_size / 1e6:.2f} MB)", highlight=False)


@app.command()
def export(
    run_dir: Path = typer.Argument(..., help="Run folder written by `rehedge run` or `rehedge train` (`last`: the "
                                   "newest under runs/)."),
    policy: str = typer.Option(None, "--policy", help="Policy to export (default: export.policy of the config)."),
    out: Path = typer.Option(None, "--out", help="Table folder to write (default: RUN_DIR/tables/POLICY)."),
    check_paths: int = typer.Option(20_000, "--check-paths", min=0, help="Held-out paths on which the table is "
                                    "scored beside its source and the baselines (0: no check)."),
) -> None:
    """Write a policy of a run as a hedge table: targets.csv, band.csv and table.json (see README)."""
    from rehedge.run_folder import load_run, resolve_run
    from rehedge.tables.export import export_policy

    run_dir = resolve_run(run_dir)
    run = load_run(run_dir)
    policies = {**run.baselines, **run.agents}
    name = policy or run.config.export.policy
    if name is None:
        fail(f"no policy chosen: give --policy NAME or set export.policy; policies: {', '.join(policies)}")
    folder = export_policy(run.config, run.problem, policies, name, out or run_dir / "tables" / name, run.market)
    size = sum(f.stat().st_size for f in folder.iterdir())
    console.print(f"hedge table of {name}: {folder} ({size / 1e6:.2f} MB)", highlight=False)
    if check_paths:
        _check_table(run, policies, name, folder, check_paths)


def _check_table(run, policies: dict, name: str, folder: Path, paths: int) -> None:
    """The exported table beside its source and the run's baselines on held-out paths: paired
    differences from the table, and a warning when a baseline scores above it."""
    from rehedge.compare import table_beside_sources

    n_paths, seed = _heldout(run.config, run.heldout_market, paths, None)
    table_name, records, winners = table_beside_sources(run, policies, name, folder, n_paths, seed)
    console.print(f"the table on {n_paths:,} held-out paths (seed {seed}): objective "
                  f"{format_money(records[table_name]['objective'])} (higher is better); difference from it, "
                  "paired, bootstrap 95% CI:", highlight=False)
    for other, record in records.items():
        if other != table_name:
            v = record["vs_reference"]
            role = "its source" if other == name else "baseline"
            console.print(f"  {other:<18} {format_interval(v['mean'], v['ci_low'], v['ci_high'])}  ({role})",
                          highlight=False)
    if winners:
        errors.print(f"warning: {', '.join(winners)} scores above the table on these paths: the table loses its "
                     "source's rank (a finer export grid may keep it)", markup=False, highlight=False)


@app.command()
def advise(
    table: Path = typer.Argument(..., help="Hedge table folder (or its table.json)."),
    spot: float = typer.Option(..., "--spot", help="Spot price of the underlying, currency per share."),
    days_left: float = typer.Option(..., "--days-left", help="Days left to the hedging horizon."),
    holding: float = typer.Option(..., "--holding", help="Current holding of the underlying, shares (- short)."),
    variance: float = typer.Option(None, "--variance", help="Current variance, annual (0.04 = 20% volatility): "
                                   "for a table with a variance axis."),
    implied_vol: float = typer.Option(None, "--implied-vol", help="Current implied volatility, annual decimal "
                                      "(0.25 = 25%): for a table with an implied_vol axis."),
    as_json: bool = typer.Option(False, "--json", help="Print one JSON object instead of text."),
) -> None:
    """One decision from a hedge table: target holding, trade, no-trade band, clamping, cautions."""
    from rehedge.tables.reader import HedgeTable, advice

    loaded = HedgeTable.load(table)
    given = {"variance": variance, "implied_vol": implied_vol}
    option = {"variance": "--variance", "implied_vol": "--implied-vol"}
    for axis, value in given.items():
        if value is not None and loaded.state != axis:
            fail(f"{option[axis]}: this table has no {axis} axis"
                 + ("" if loaded.state is None else f" (it reads the {loaded.state}: give {option[loaded.state]})"))
    if loaded.state is not None and given[loaded.state] is None:
        fail(f"{option[loaded.state]} is required: this table's targets depend on the {loaded.state}")
    state = None if loaded.state is None else given[loaded.state]
    record = advice(loaded, spot, days_left, holding, state)
    if as_json:
        sys.stdout.write(json.dumps({**record, "caution": CAUTION}, indent=2) + "\n")
        if record["off_map"]:
            raise typer.Exit(OFF_MAP)
        return
    trade, lot = record["trade_shares"], record["lot_shares"]
    lots = "" if lot == 1 else f" ({abs(trade) / lot:,.0f} lots of {lot:,.6g})"
    action = "no trade" if trade == 0 else f"{'buy' if trade > 0 else 'sell'} {abs(trade):,.6g} shares{lots}"
    currency = record["currency"] or "currency units"
    lines = [
        f"hedge table {record['table']} (policy {record['policy']}, config {record['config']}, "
        f"created {record['created']})",
        f"at spot {spot:g} (moneyness {record['moneyness']:.4f}), {days_left:g} days left"
        + ("" if state is None else f", {loaded.state} {state:g}") + f", holding {holding:,.6g} shares:",
        f"  target holding  {record['target_shares']:,.6g} shares",
        f"  trade           {action}" + ("" if trade == 0 else f", to {record['traded_target_shares']:,.6g} shares"),
        f"  its cost        {record['trade_cost']:,.2f} {currency} (spread, fees and impact at this spot)",
        f"  delta hedge     {record['delta_hedge_shares']:,.6g} shares (Black-Scholes at the mark volatility)",
    ]
    if record["band_lower_shares"] is None:
        lines.append("  no-trade band   none at this point (the policy trades to its target from any holding)")
    else:
        where = "inside" if record["inside_band"] else "outside"
        lines.append(f"  no-trade band   [{record['band_lower_shares']:,.6g}, {record['band_upper_shares']:,.6g}] "
                     f"shares; the holding is {where} it")
    for note in record["clamping"]:
        lines.append(f"  CLAMPED: {note}")
    for note in record["off_map"]:
        lines.append(f"  OFF THE MAP: {note}")
    if not record["training_range_known"]:
        lines.append("  this table records no training range: whether its policy met such a state is unknown")
    console.print("\n".join(lines), highlight=False, markup=False)
    console.print(CAUTION, style="dim", highlight=False)
    if record["off_map"]:
        errors.print(f"error: off the map: the advice above is for a state the policy never met in training "
                     f"(exit {OFF_MAP})", markup=False, highlight=False)
        raise typer.Exit(OFF_MAP)


@app.command("sweep")
def sweep_command(
    config: Path = typer.Argument(..., help="TOML config file with a [sweep] table."),
    workers: int = typer.Option(1, "--workers", min=1, help="Local worker processes (1: one cell after another)."),
    scheduler: str = typer.Option(None, "--scheduler", help="dask.distributed scheduler, e.g. tcp://HOST:8786 (then --workers is ignored)."),
    resume: bool = typer.Option(False, "--resume", help="Keep finished cells of the sweep folder; run the rest."),
    runs_dir: Path = typer.Option(Path("runs"), "--runs-dir", help="Where the sweep folder goes."),
    sweep_dir: Path = typer.Option(None, "--sweep-dir", help="The sweep folder (default RUNS_DIR/NAME-sweep)."),
    paths: int = typer.Option(None, "--paths", min=1, help="Held-out paths per cell (default: data.heldout_paths)."),
    as_json: bool = typer.Option(False, "--json", help="Print one JSON object instead of a table."),
    quiet: bool = typer.Option(False, "--quiet", help="No progress bar."),
) -> None:
    """Run every cell of CONFIG's sweep (each a run folder of its own) locally or on a dask cluster;
    write the combined table (sweep.csv, sweep.json) and the cost-risk frontier (frontier.png)."""
    from rehedge.sweep import run_sweep, sweep_cells

    try:
        _, cells = sweep_cells(config)
        with _progress(quiet) as start:
            result = run_sweep(config, runs_dir=runs_dir, sweep_dir=sweep_dir, workers=workers,
                               scheduler=scheduler, resume=resume, heldout_paths=paths,
                               progress=start(f"sweep: {len(cells)} cells", len(cells)))
    except ConnectionError as error:
        fail(f"--scheduler {scheduler}: {error}")
    if as_json:
        sys.stdout.write((result.folder / "sweep.json").read_text())
    else:
        _print_sweep(result)
    if result.failed:
        errors.print(f"error: {len(result.failed)} of {len(result.cells)} cells failed; see "
                     f"{result.folder / 'failures.json'}", markup=False, highlight=False)
        raise typer.Exit(1)


def _print_sweep(result) -> None:
    keys = [key for key in result.table.columns if key in result.cells[0].overrides]
    records = result.table.to_dict("records")

    def money(key: str) -> list[str]:
        shown = money_formatter([row.get(key) for row in records])
        return [shown(row[key]) if row.get(key) == row.get(key) and row.get(key) is not None else "-"
                for row in records]

    lead = [(key.rsplit(".", 1)[-1], [f"{row[key]:g}" if isinstance(row[key], float) else str(row[key])
                                      for row in records], "right") for key in keys]
    lead += [("status", [row["status"] for row in records], "left"),
             ("policy", [row["policy"] or row["error"][:60] for row in records], "left")]
    _print_split(f"sweep {result.folder}: {len(result.cells)} cells in {result.seconds:.0f} s; money in currency "
                 "units, costs per path", lead,
                 [("objective", money("objective")), ("std P&L", money("std_pnl")), ("CVaR 95", money("cvar_95")),
                  ("cost", money("mean_cost"))])
    if (result.folder / "frontier.png").is_file():
        console.print(f"cost-risk frontier: {result.folder / 'frontier.png'}", highlight=False)
    console.print(f"combined table: {result.folder / 'sweep.csv'} (and sweep.json)", highlight=False)
    console.print(CAUTION, style="dim", highlight=False)


@app.command("bench")
def bench_command(quick: bool = typer.Option(False, "--quick", help="Small sizes: a minute or two.")) -> None:
    """Print the benchmark table (speed, scaling, memory, sweep speed-up): `python -m benchmarks`."""
    root = Path(__file__).resolve().parents[1]
    if not (root / "benchmarks" / "__main__.py").is_file():
        fail("the benchmarks live in the source tree: run `rehedge bench` from a checkout (pip install -e .)")
    code = subprocess.call([sys.executable, "-m", "benchmarks", *(["--quick"] if quick else [])], cwd=root)
    raise typer.Exit(code)


def _policies_of(source: Path, start):
    """Config or run folder -> (config, problem, held-out market, policies, tuning, kinds)."""
    from rehedge.build import build_markets, build_problem, prepare_baselines
    from rehedge.config import load_config
    from rehedge.run_folder import load_run

    if source.is_dir():
        run = load_run(source)
        kinds = {s.name: s.kind for s in [*run.config.baselines, *run.config.agents]}
        return run.config, run.problem, run.heldout_market, {**run.baselines, **run.agents}, {}, kinds
    cfg = load_config(source)
    problem = build_problem(cfg)
    market, heldout_market = build_markets(cfg)
    policies, tuning = prepare_baselines(cfg, problem, market, start=start)
    return cfg, problem, heldout_market, policies, tuning, {spec.name: spec.kind for spec in cfg.baselines}


def main() -> None:
    """Console entry point: usage errors and errors a user can cause (config, run folder, hedge table,
    CSV) end in one line on stderr and exit code 2."""
    if len(sys.argv) == 1:  # `rehedge` alone: the help, and a clean exit
        sys.argv.append("--help")
    try:
        code = app(standalone_mode=False, prog_name="rehedge")
    except typer.Abort:
        sys.exit(1)
    except typer.TyperException as error:  # usage errors: bad option values, missing arguments, unknown commands
        context = getattr(error, "ctx", None)
        hint = f" (see `{context.command_path} --help`)" if context is not None else ""
        errors.print(f"error: {error.format_message()}{hint}", markup=False, highlight=False)
        sys.exit(getattr(error, "exit_code", 2))
    if code == INTERRUPTED:  # Ctrl-C, which typer turns into this exit code; run_config removed its folder
        errors.print("error: interrupted; no unfinished run folder is kept", markup=False, highlight=False)
    sys.exit(code if isinstance(code, int) else 0)


if __name__ == "__main__":  # pragma: no cover
    main()
