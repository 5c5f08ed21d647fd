"""The `rehedge` command line: parses arguments and calls library functions, nothing more."""

from __future__ import annotations

import json
import subprocess
import sys
from contextlib import contextmanager
from pathlib import Path

import typer
from rich import box
from rich.console import Console
from rich.progress import BarColumn, MofNCompleteColumn, Progress, TextColumn, TimeElapsedColumn
from rich.table import Table

from agents.config import ConfigError, load_config, load_variants
from agents.evaluate import evaluate_with_quotes, write_metrics
from agents.report import build_report, format_money
from agents.scenario import build_market, build_problem, prepare_baselines
from agents.sweep import run_sweep, sweep_cells
from agents.training import load_run, train, write_run

CAUTION = (
    "Decision support, not advice: a policy is only as good as the market model and data it was "
    "trained on; check positions, limits and fills against the desk's own risk systems and the "
    "rules that apply where you trade."
)

app = typer.Typer(
    name="rehedge",
    help="Train, compare and export option-hedging policies under trading costs, impact and financing.",
    no_args_is_help=True,
    add_completion=False,
    pretty_exceptions_enable=False,
)
# Tables are wide: when the output is not a terminal, do not fold them at 80 columns.
console = Console(width=None if sys.stdout.isatty() else 160)
errors = Console(stderr=True, soft_wrap=True)


def fail(message: str, code: int = 2) -> None:
    """One line on stderr and a non-zero exit: for errors a user can cause."""
    errors.print(f"error: {message}", markup=False, highlight=False)
    raise typer.Exit(code)


def _load(path: Path):
    try:
        return load_config(path)
    except ConfigError as error:
        fail(str(error))


def _load_variants(path: Path):
    try:
        return load_variants(path)
    except ConfigError as error:
        fail(str(error))


@contextmanager
def _progress(quiet: bool):
    """A rich progress bar on stderr (or nothing with --quiet); yields ``start(label, total) -> advance``."""
    if quiet:
        yield lambda label, total: (lambda n: None)
        return
    with Progress(
        TextColumn("{task.description}"), BarColumn(), MofNCompleteColumn(), TimeElapsedColumn(),
        console=errors, transient=True,
    ) as progress:

        def start(label: str, total: int):
            task = progress.add_task(label, total=total)
            return lambda n: progress.advance(task, n)

        yield start


_money = format_money


def _count(value: float) -> str:
    return f"{value:.2f}"


_COLUMNS = [
    ("objective", "objective", _money),
    ("mean_pnl", "mean P&L", _money),
    ("std_pnl", "std P&L", _money),
    ("cvar_95", "CVaR 95", _money),
    ("cvar_99", "CVaR 99", _money),
    ("mean_cost", "cost", _money),
    ("mean_impact", "impact", _money),
    ("turnover", "turnover", _count),
    ("trades", "trades", _count),
]


def _print_table(title: str, records: list[dict]) -> None:
    table = Table(title=title, title_justify="left", box=box.SIMPLE_HEAD, pad_edge=False)
    table.add_column("policy", no_wrap=True)
    present = [c for c in _COLUMNS if c[0] in records[0]]
    for _, header, _ in present:
        table.add_column(header, justify="right", no_wrap=True)
    for record in records:
        label = record["name"] if record["kind"] in ("", record["name"]) else f"{record['name']} ({record['kind']})"
        table.add_row(label, *(fmt(record[key]) for key, _, fmt in present))
    console.print(table)


@app.command("check-config")
def check_config(config: Path = typer.Argument(..., help="TOML config file.")) -> None:
    """Validate a config file; print what it describes, or the first error in one line."""
    variants = _load_variants(config)
    cfg = variants[0]
    console.print(
        f"{config}: ok: {len(cfg.book.options)} option(s), {cfg.notional_shares:g} notional shares, "
        f"{cfg.schedule.steps} rehedges over {cfg.horizon_days:g} days, "
        f"{len(cfg.baselines)} baseline(s), {len(cfg.agents)} agent(s)"
        + (f", {len(variants)} sweep variants" if len(variants) > 1 else ""),
        highlight=False,
    )


def _records_out(cfg, n_paths: int, seed: int, evaluation, tuning: dict, as_json: bool, run_dir=None) -> None:
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
    _print_table(
        f"{cfg.name}: {n_paths:,} held-out paths, seed {seed}; money in currency units, "
        "costs per path, turnover in notionals",
        records,
    )
    reference = evaluation.reference
    if reference in evaluation.results:
        console.print(f"objective difference from {reference}, paired over paths, bootstrap 95% CI "
                      f"({evaluation.bootstrap_samples} resamples, seed {evaluation.bootstrap_seed}):", highlight=False)
        for record in records:
            if record["name"] != reference:
                v = record["vs_reference"]
                verdict = "above" if v["ci_low"] > 0 else "below" if v["ci_high"] < 0 else "not distinguishable"
                console.print(f"  {record['name']:<18} {v['mean']:+.4g}  [{v['ci_low']:+.4g}, {v['ci_high']:+.4g}]"
                              f"  {verdict}", highlight=False)
    for name, result in tuning.items():
        console.print(f"tuned on training paths: {name}.{result.parameter} = {result.value:.6g}", highlight=False)
    if run_dir is not None:
        console.print(f"run folder: {run_dir}", highlight=False)
    console.print(CAUTION, style="dim", highlight=False)


def _heldout(cfg, paths: int | None, seed: int | None) -> tuple[int, int]:
    return paths or cfg.data.heldout_paths, cfg.data.heldout_seed if seed is None else seed


@app.command()
def evaluate(
    source: Path = typer.Argument(..., help="TOML config file, or a run folder written by `rehedge run`/`train`."),
    paths: int = typer.Option(None, "--paths", min=1, help="Held-out paths (default: data.heldout_paths)."),
    seed: int = typer.Option(None, "--seed", min=0, help="Held-out seed (default: data.heldout_seed)."),
    as_json: bool = typer.Option(False, "--json", help="Print one JSON object instead of a table."),
    quiet: bool = typer.Option(False, "--quiet", help="No progress bars."),
) -> None:
    """Score every baseline of a config (or every policy of a run folder) on held-out paths, ranked by objective."""
    cfg, evaluation, tuning, n_paths, seed = _score(source, paths, seed, quiet)
    _records_out(cfg, n_paths, seed, evaluation, tuning, as_json)


def _score(source: Path, paths: int | None, seed: int | None, quiet: bool):
    """Policies of a config or run folder on its held-out paths, with CIs and quotes."""
    with _progress(quiet) as start:
        cfg, problem, market, policies, tuning, kinds = _policies_of(source, start)
        n_paths, seed = _heldout(cfg, paths, seed)
        evaluation = evaluate_with_quotes(
            problem, policies, market, n_paths, seed, kinds=kinds, chunk_paths=cfg.data.chunk_paths,
            progress=start("hedging held-out paths (both sides of the book)", n_paths),
            reference=_reference(cfg, policies), bootstrap_samples=cfg.report.bootstrap_samples,
        )
    return cfg, evaluation, tuning, n_paths, seed


def _reference(cfg, policies) -> str | None:
    return cfg.report.reference_policy if cfg.report.reference_policy in policies else None


def _train(cfg, config: Path, runs_dir: Path, quiet: bool):
    try:
        with _progress(quiet) as start:
            training = train(cfg, start)
    except ConfigError as error:
        fail(str(error))
    return training, write_run(training, config.read_text(), runs_dir)


@app.command("train")
def train_command(
    config: Path = typer.Argument(..., help="TOML config file."),
    runs_dir: Path = typer.Option(Path("runs"), "--runs-dir", help="Where run folders are written."),
    quiet: bool = typer.Option(False, "--quiet", help="No progress bars."),
) -> None:
    """Tune the baselines and fit every agent of CONFIG on its training paths; write a run folder
    (one per variant when the config has a sweep)."""
    for cfg in _load_variants(config):
        training, run_dir = _train(cfg, config, runs_dir, quiet)
        for line in training.log:
            console.print(line, highlight=False)
        console.print(f"run folder: {run_dir}", highlight=False)


@app.command()
def run(
    config: Path = typer.Argument(..., help="TOML config file."),
    paths: int = typer.Option(None, "--paths", min=1, help="Held-out paths (default: data.heldout_paths)."),
    runs_dir: Path = typer.Option(Path("runs"), "--runs-dir", help="Where run folders are written."),
    as_json: bool = typer.Option(False, "--json", help="Print one JSON object instead of a table."),
    quiet: bool = typer.Option(False, "--quiet", help="No progress bars."),
) -> None:
    """The main job: train every agent, then score agents and baselines on the same held-out paths
    (each variant in turn when the config has a sweep)."""
    run_dirs = []
    variants = _load_variants(config)
    sweep = len(variants) > 1
    for cfg in variants:
        training, run_dir = _train(cfg, config, runs_dir, quiet)
        run_dirs.append(run_dir)
        n_paths, seed = _heldout(cfg, paths, None)
        with _progress(quiet) as start:
            evaluation = evaluate_with_quotes(
                training.problem, training.policies, training.market, n_paths, seed, kinds=training.kinds,
                chunk_paths=cfg.data.chunk_paths, progress=start("hedging held-out paths", n_paths),
                reference=_reference(cfg, training.policies), bootstrap_samples=cfg.report.bootstrap_samples,
            )
        write_metrics(evaluation, run_dir)
        if not sweep:
            build_report(run_dir)
        _records_out(cfg, n_paths, seed, evaluation, training.tuning, as_json, run_dir)
    if sweep:
        # A sweep: every variant's report also draws the cost-risk frontier across the variants.
        for run_dir in run_dirs:
            siblings = [d for d in run_dirs if d != run_dir]
            (run_dir / "sweep.json").write_text(json.dumps({"siblings": [d.name for d in siblings]}, indent=2))
            build_report(run_dir, siblings)


@app.command()
def quote(
    source: Path = typer.Argument(..., help="TOML config file, or a run folder."),
    paths: int = typer.Option(None, "--paths", min=1, help="Held-out paths (default: data.heldout_paths)."),
    as_json: bool = typer.Option(False, "--json", help="Print one JSON object instead of a table."),
    quiet: bool = typer.Option(False, "--quiet", help="No progress bars."),
) -> None:
    """Bid and ask per policy: the premium the kept risk justifies (mean-variance and CVaR 95)."""
    cfg, evaluation, _, n_paths, seed = _score(source, paths, None, quiet)
    rows = evaluation.to_records()
    if as_json:
        keys = ("mark", "quote_bid", "quote_ask", "cvar_bid", "cvar_ask", "spread_bid", "spread_ask",
                "spread_bid_vol_points", "spread_ask_vol_points")
        out = {"config": cfg.name, "heldout_paths": n_paths, "heldout_seed": seed,
               "quotes": [{"name": r["name"], **{k: r[k] for k in keys}} for r in rows], "caution": CAUTION}
        sys.stdout.write(json.dumps(out, indent=2) + "\n")
        return
    table = Table(title=f"{cfg.name}: premium for the book as configured (ask) and the opposite book (bid), "
                        f"{n_paths:,} held-out paths; Black-Scholes mark {rows[0]['mark']:,.4g}",
                  title_justify="left", box=box.SIMPLE_HEAD, pad_edge=False)
    for header in ("policy", "bid", "ask", "spread bid/ask (vol pts)", "CVaR-95 bid", "CVaR-95 ask"):
        table.add_column(header, justify="left" if header == "policy" else "right", no_wrap=True)
    for r in rows:
        table.add_row(r["name"], _money(r["quote_bid"]), _money(r["quote_ask"]),
                      f"{r['spread_bid_vol_points']:.2f} / {r['spread_ask_vol_points']:.2f}",
                      _money(r["cvar_bid"]), _money(r["cvar_ask"]))
    console.print(table)
    console.print("bid and ask: mean-variance indifference premiums (mark -/+ the risk-adjusted cost of hedging); "
                  "the bid mirrors each policy for the opposite book.", highlight=False)
    console.print(CAUTION, style="dim", highlight=False)


@app.command()
def report(run_dir: Path = typer.Argument(..., help="Run folder written by `rehedge run`.")) -> None:
    """Rebuild report.html of a run folder from its saved results."""
    if not (run_dir / "metrics.json").is_file():
        fail(f"{run_dir}: no metrics.json (a folder written by `rehedge run` has one)")
    sweep = run_dir / "sweep.json"
    siblings = []
    if sweep.is_file():
        siblings = [run_dir.parent / name for name in json.loads(sweep.read_text())["siblings"]]
        siblings = [d for d in siblings if (d / "metrics.json").is_file()]
    try:
        path = build_report(run_dir, siblings)
    except ConfigError as error:
        fail(str(error))
    console.print(f"report: {path} ({path.stat().st_size / 1e6:.2f} MB)", highlight=False)


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
    try:
        _, cells = sweep_cells(config)
        with _progress(quiet) as start:
            result = run_sweep(config, runs_dir=runs_dir, sweep_dir=sweep_dir, workers=workers,
                               scheduler=scheduler, resume=resume, heldout_paths=paths,
                               progress=start(f"sweep: {len(cells)} cells", len(cells)))
    except ConfigError as error:
        fail(str(error))
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
    table = Table(title=f"sweep {result.folder}: {len(result.cells)} cells in {result.seconds:.0f} s; money in "
                        "currency units, costs per path", title_justify="left", box=box.SIMPLE_HEAD, pad_edge=False)
    for header in [*(k.rsplit(".", 1)[-1] for k in keys), "status", "policy", "objective", "std P&L", "CVaR 95",
                   "cost"]:
        table.add_column(header, justify="left" if header in ("status", "policy") else "right", no_wrap=True)
    for row in result.table.to_dict("records"):
        numbers = [_money(row[k]) if row.get(k) == row.get(k) and row.get(k) is not None else "-"
                   for k in ("objective", "std_pnl", "cvar_95", "mean_cost")]
        table.add_row(*(f"{row[k]:g}" if isinstance(row[k], float) else str(row[k]) for k in keys),
                      row["status"], row["policy"] or row["error"][:60], *numbers)
    console.print(table)
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
    """Config or run folder -> (config, problem, market, policies, tuning, kinds)."""
    if source.is_dir():
        try:
            run = load_run(source)
        except ConfigError as error:
            fail(str(error))
        kinds = {s.name: s.kind for s in [*run.config.baselines, *run.config.agents]}
        return run.config, run.problem, run.market, {**run.baselines, **run.agents}, {}, kinds
    cfg = _load(source)
    problem, market = build_problem(cfg), build_market(cfg)
    start("tuning baselines on training paths", 1)
    policies, tuning = prepare_baselines(cfg, problem, market)
    return cfg, problem, market, policies, tuning, {spec.name: spec.kind for spec in cfg.baselines}


def main() -> None:
    """Console entry point: usage errors end in one line on stderr and exit code 2, like config errors."""
    try:
        code = app(standalone_mode=False)
    except typer.Abort:
        sys.exit(1)
    except typer.TyperException as error:  # usage errors: bad option values, missing arguments, unknown commands
        context = getattr(error, "ctx", None)
        hint = f" (see `{context.command_path} --help`)" if context is not None else ""
        errors.print(f"error: {error.format_message()}{hint}", markup=False, highlight=False)
        sys.exit(getattr(error, "exit_code", 2))
    sys.exit(code if isinstance(code, int) else 0)


if __name__ == "__main__":  # pragma: no cover
    main()
