"""One self-contained HTML report of a scored run folder.

:func:`build_report` reads a run folder written by ``rehedge run`` (the
config, ``manifest.json``, ``metrics.json``, ``heldout.npz`` and the fitted
agents) and writes ``report.html`` beside them: the cautions, the scenario,
the ranked summary table (the numbers of ``metrics.json``, formatted, never
recomputed) and figures as inline base64 PNGs. The file fetches nothing, so
it opens offline in any browser and can be mailed as it is.

Figures: the held-out P&L distribution of every policy; each learned agent's
map (target holding against spot at three times, with the Black-Scholes hedge,
the Whalley-Wilmott band and the agent's own no-trade region); the cumulative
mean cost over time; one held-out path with every policy's holdings; and,
with sibling runs of a sweep, the cost-risk frontier.
"""

from __future__ import annotations

import html
from collections.abc import Sequence
from pathlib import Path

import matplotlib

from rehedge.formats import (
    CAUTION,
    ce_caution,
    format_days,
    format_money,
    format_percent,
    format_signed_money,
    heldout_text,
    metric_columns,
    tail_caution,
)
from rehedge.report.figures import (
    STYLE,
    colors_of,
    cost_figure,
    frontier_figure,
    labels_of,
    map_figures,
    path_figure,
    pnl_figure,
    sample_path,
)
from rehedge.report.scored import Scored, load_scored, policy_label, read_sibling

_CSS = """
body { font-family: -apple-system, "Segoe UI", Helvetica, Arial, sans-serif; color: #2b2a27;
       max-width: 1120px; margin: 0 auto; padding: 18px 26px 40px; line-height: 1.45; font-size: 14px; }
h1 { font-size: 22px; margin: 4px 0 2px; color: #1f4e79; }
h2 { font-size: 17px; margin: 28px 0 8px; border-bottom: 2px solid #e6e1d6; padding-bottom: 3px; color: #1f4e79; }
h3 { font-size: 14px; margin: 16px 0 6px; }
.caution { background: #fbf3e4; border-left: 5px solid #d1603d; padding: 10px 14px; margin: 12px 0 18px; }
.muted { color: #6b675e; }
table { border-collapse: collapse; margin: 6px 0 10px; font-size: 12.5px; }
th, td { padding: 4px 8px; border-bottom: 1px solid #e6e1d6; vertical-align: top; }
th { background: #f5f3ee; text-align: left; font-weight: 600; }
td.num { text-align: right; font-variant-numeric: tabular-nums; white-space: nowrap; }
table.summary th { text-align: right; }
table.summary th:first-child, table.summary th:nth-child(2) { text-align: left; }
table.facts th { width: 210px; }
figure { margin: 14px 0 22px; }
figure img { max-width: 100%; height: auto; display: block; }
figcaption { font-size: 12.5px; color: #55524b; margin-top: 4px; max-width: 980px; }
.better { color: #2f7a4d; } .worse { color: #b3412c; }
@media print { body { max-width: none; padding: 0; font-size: 11px; } table { font-size: 10px; }
               figure, table { break-inside: avoid; } h2, h3 { break-after: avoid; } }
"""


def _e(value) -> str:
    return html.escape(str(value), quote=True)


def _facts_table(rows: list[tuple[str, str]]) -> str:
    body = "".join(f"<tr><th>{_e(k)}</th><td>{_e(v)}</td></tr>" for k, v in rows)
    return f'<table class="facts">{body}</table>'


def _scenario_html(scored: Scored) -> str:
    run, metrics, manifest = scored.run, scored.metrics, scored.run.manifest
    config = run.config
    market, frictions, objective, schedule = config.market, config.frictions, config.objective, config.schedule
    records = scored.records
    paths = int(records[0]["paths"]) if records and "paths" in records[0] else config.data.heldout_paths
    tail = tail_caution(paths)
    legs = "".join(
        f"<tr><td>{_e(o.kind)}</td><td class='num'>{_e(f'{o.strike:g}')}</td>"
        f"<td class='num'>{_e(f'{o.expiry_days:g}')}</td><td class='num'>{_e(f'{o.quantity:+g}')}</td>"
        f"<td class='num'>{_e(f'{o.multiplier:g}')}</td><td class='num'>{_e(f'{o.quantity * o.multiplier:+,g}')}</td>"
        f"<td>{'sold' if o.quantity < 0 else 'bought'}</td></tr>"
        for o in config.book.options
    )
    book = ("<table><thead><tr><th>kind</th><th>strike (currency)</th><th>expiry (days)</th>"
            "<th>quantity (contracts)</th><th>multiplier (shares per contract)</th><th>shares</th><th>side</th>"
            f"</tr></thead><tbody>{legs}</tbody></table>")
    limit = frictions.position_limit_shares
    facts = [
        ("config", config.name),
        ("description", config.description or "(none)"),
        ("market", market.describe()),
        ("pricing", _pricing_text(config, run.problem)),
        ("schedule", f"{schedule.steps} rehedges every {format_days(schedule.step_days)} "
                     f"(horizon {format_days(config.horizon_days)}), settlement: {schedule.settlement}"),
        ("frictions", f"proportional cost {frictions.cost_rate * 1e4:g} bps of traded notional; fixed cost "
                      f"{frictions.fixed_cost:g} per trade; temporary impact coefficient "
                      f"{frictions.impact_coefficient:g}, exponent {frictions.impact_exponent:g}; permanent "
                      f"impact {frictions.permanent_impact:g}; ADV {frictions.adv_shares:,.0f} shares; borrow fee "
                      f"{format_percent(frictions.borrow_fee)} a year; position limit "
                      f"{'none' if limit is None else f'{limit:,.0f} shares'}"),
        ("objective", run.problem.objective.form.describe(run.problem.objective)
                      + f"; VaR/CVaR levels {', '.join(format_percent(v) for v in objective.var_levels)}"),
        ("held-out paths", heldout_text(paths, config.data.heldout_paths, metrics.get("heldout_seed"),
                                        config.market.model == "historical")
                           + _dates_text(manifest, "heldout", config.horizon_days)
                           + (f"; {tail}" if tail else "")),
        ("training paths", f"{manifest.get('sizes', {}).get('train_paths', config.data.train_paths):,} paths, "
                           f"seed {config.data.train_seed}" + _dates_text(manifest, "train", config.horizon_days)),
        ("bootstrap", f"{metrics.get('bootstrap_samples')} paired resamples over paths, "
                      f"seed {metrics.get('bootstrap_seed')}; reference policy: {metrics.get('reference_policy')}"),
        ("run folder", f"{run.path.name.removesuffix('.partial')}, created {manifest.get('created', 'n/a')}"),
        ("config hash", manifest.get("config_hash", "n/a")),
        ("software", f"rehedge {manifest.get('version', 'n/a')}, Python {manifest.get('python', 'n/a')}, "
                     f"numpy {manifest.get('numpy', 'n/a')}, scikit-learn {manifest.get('scikit_learn', 'n/a')}"),
    ]
    for name, grid in manifest.get("grid_convergence", {}).items():
        sizes = " x ".join(str(n) for n in grid["grid"].values())
        coarser = " x ".join(str(n) for n in grid["coarser_grid"].values())
        facts.append((f"grid optimum {name}: convergence",
                      f"value at the start {format_money(grid['value'])} on {sizes} points, "
                      f"{format_money(grid['coarser_value'])} on {coarser} (difference {grid['difference']:.3g}, "
                      "currency; the finer grid's own error is of that order or less)"))
    tuned = manifest.get("tuned", {})
    if tuned:
        facts.append(("tuned on training paths", "; ".join(
            f"{name}.{key} = {value:.6g}" for name, entry in tuned.items()
            for key, value in entry.items() if key != "train_objective")))
    if records and "mark" in records[0]:
        mark = records[0]["mark"]
        # The mark is the configured position's liability: positive when the desk has sold the book.
        meaning = ("the premium received for the book the desk has sold" if mark > 0 else
                   "minus the premium paid for the book the desk has bought")
        name = "model mark of the book" if config.pricing.marks == "model" else "Black-Scholes mark of the book"
        facts.append((name, f"{format_money(mark)} (currency): {meaning}"))
    return (f"<h2>Scenario</h2>{_facts_table(facts[:2])}<h3>Book</h3>{book}"
            f"<h3>Market, frictions, objective and data</h3>{_facts_table(facts[2:])}")


def _pricing_text(config, problem) -> str:
    basis = f"{config.pricing.days_per_year:g} days per year"
    marks = getattr(config.market, "marks", "configured")
    if marks == "implied":
        return (f"Black-Scholes marks and premium at the implied volatility of each date (column "
                f"{config.market.implied_volatility_column}), per path; its training mean "
                f"{format_percent(problem.marks.volatility)} is the typical level (quotes); {basis}")
    if marks == "realised":
        return (f"Black-Scholes marks at the realised volatility of the training period, "
                f"{format_percent(problem.marks.volatility)}; {basis}")
    if config.pricing.marks == "model":
        how = ("the Heston price (Lewis's Fourier integral) at each path's variance"
               if config.market.model == "heston" else "the Merton price (its series over jump counts)")
        return (f"model marks: the book at {how}, risk-neutral with the market's parameters; the Black-Scholes "
                f"baselines hedge at volatility {format_percent(problem.marks.volatility)}; {basis}")
    return f"Black-Scholes marks at volatility {format_percent(problem.marks.volatility)}, {basis}"


def _dates_text(manifest: dict, role: str, horizon_days: float) -> str:
    """Dates a historical run's paths come from ('' for a simulated market)."""
    facts = manifest.get("history", {}).get(role)
    if not facts:
        return ""
    text = f"; {facts['source']} of {facts['first_date']} to {facts['last_date']} ({facts['rows']:,} trading days"
    if "windows" in facts:
        text += f", a window every {facts['stride_days']} trading days"
        if role == "heldout" and facts["stride_days"] < horizon_days:
            text += "; windows overlap, so the paired intervals over paths are too narrow"
    else:
        text += f", mean block {facts['mean_block_days']:g} trading days"
    return text + ")"


def _cell(key: str, value, formatter) -> str:
    return f'<td class="num" data-key="{_e(key)}" data-value="{_e(repr(value))}">{_e(formatter(value))}</td>'


# The summary's tables: each policy's row in each, so every column fits a 1,400 px window and a page.
_SUMMARY_TABLES = (
    ("Ranking", ("objective", "mean_pnl", "std_pnl", "ce_effective_paths")),
    ("Tail risk", ("var_", "cvar_", "entropic_risk")),
    ("Trading", ("mean_cost", "mean_impact", "turnover", "trades")),
    ("Quotes", ("quote_", "spread_")),
)


def _summary_table(records: list[dict], columns, versus_of=None) -> str:
    """One table of the summary: rank, policy and ``columns`` (with the difference from the
    reference after the first column when ``versus_of`` makes its cells). A ``*_ci_low`` column and
    the ``*_ci_high`` after it share one cell, the interval."""
    headers = ["#", "policy", columns[0].long]
    if versus_of is not None:
        headers += versus_of(None)
    groups = []  # each a column, or the low and high of an interval
    for column in columns[1:]:
        if column.key.endswith("_ci_high") and groups and groups[-1][0].key.endswith("_ci_low"):
            groups[-1].append(column)
        else:
            groups.append([column])
    headers += [group[0].long if len(group) == 1 else group[0].long.replace(" low", "") for group in groups]
    shown = {}
    for group in [[columns[0]], *groups]:
        formatter = group[0].formatter([r[column.key] for r in records for column in group])
        shown.update(dict.fromkeys((column.key for column in group), formatter))

    def cell(group, record) -> str:
        if len(group) == 1:
            return _cell(group[0].key, record[group[0].key], shown[group[0].key])
        low, high = (record[column.key] for column in group)
        key = group[0].key.removesuffix("_low")
        return (f'<td class="num" data-key="{_e(key)}" data-value="{_e(repr(low))} {_e(repr(high))}">'
                f"[{_e(shown[group[0].key](low))}, {_e(shown[group[0].key](high))}]</td>")

    rows = []
    for rank, record in enumerate(records, start=1):
        cells = [f'<td class="num">{rank}</td>',
                 f'<td data-key="name">{_e(policy_label(record["name"], record.get("kind", "")))}</td>',
                 cell([columns[0]], record)]
        if versus_of is not None:
            cells += versus_of(record)
        cells += [cell(group, record) for group in groups]
        rows.append(f'<tr data-policy="{_e(record["name"])}">{"".join(cells)}</tr>')
    head = "".join(f"<th>{_e(h)}</th>" for h in headers)
    return f'<table class="summary"><thead><tr>{head}</tr></thead><tbody>{"".join(rows)}</tbody></table>'


def _versus_cells(reference: str, label: str, currency: str = "currency"):
    """Headers (for None) or cells of a record's difference from ``reference`` (named ``label``)."""

    def cells(record: dict | None) -> list[str]:
        if record is None:
            return [f"vs {label}: mean ({currency})", f"95% CI ({currency})", "verdict"]
        versus = record.get("vs_reference")
        if versus is None:
            return ['<td class="num">n/a</td>'] * 2 + ["<td></td>"]
        mean = _cell("vs_reference_mean", versus["mean"], format_signed_money)
        if record["name"] == reference:
            return [mean, '<td class="num">reference</td>', "<td></td>"]
        low, high = versus["ci_low"], versus["ci_high"]
        verdict = "better" if low > 0 else "worse" if high < 0 else "not distinguishable"
        return [mean,
                f'<td class="num" data-key="vs_reference_ci" data-value="{_e(repr(low))} {_e(repr(high))}">'
                f"[{_e(format_signed_money(low))}, {_e(format_signed_money(high))}]</td>",
                f'<td class="{verdict.split()[0]}">{verdict}</td>']

    return cells


def _summary_html(scored: Scored) -> str:
    records = scored.records
    reference = scored.metrics.get("reference_policy")
    columns = metric_columns(records[0], scored.run.config.currency)
    has_versus = any("vs_reference" in r for r in records)
    reference_label = policy_label(reference, next((r.get("kind", "") for r in records if r["name"] == reference), ""))
    note = ("Ranked by objective (higher is better), in the same order in every table. Every number is from "
            "this run's metrics.json, formatted; money in the config's currency, costs and P&L per path over "
            "the horizon, VaR and CVaR as positive losses. ")
    form = scored.run.problem.objective.form
    if has_versus:
        note += (f"The difference from {reference_label} is the {form.difference_words}, with a "
                 f"paired bootstrap 95% interval ({scored.metrics.get('bootstrap_samples')} resamples of the paths); "
                 "'better' or 'worse' than it when the interval excludes zero. ")
    if "quote_bid" in records[0]:
        note += (f"Bid and ask: {form.quote_words}"
                 + " for the opposite and the configured book; spreads are each quote's distance from the mark, "
                 "in Black-Scholes implied-volatility points.")
    note += form.measure_note
    parts = [f'<h2>Summary</h2><p class="muted">{_e(note)}</p>']
    if caution := ce_caution(records):
        parts.append(f'<p class="caution">{_e(caution)}</p>')
    for title, prefixes in _SUMMARY_TABLES:
        chosen = [c for c in columns if c.key.startswith(prefixes)]
        if not chosen:
            continue
        versus = (_versus_cells(reference, reference_label, scored.run.config.currency)
                  if has_versus and title == "Ranking" else None)
        parts.append(f"<h3>{_e(title)}</h3>{_summary_table(records, chosen, versus)}")
    return "".join(parts)


def _figure_html(uri: str, caption: str, alt: str, ident: str) -> str:
    return (f'<figure id="{_e(ident)}"><img src="{uri}" alt="{_e(alt)}">'
            f"<figcaption>{_e(caption)}</figcaption></figure>")


def build_report(run_dir: Path, siblings: Sequence[Path] = (), staging: bool = False) -> Path:
    """Write ``run_dir/report.html``: one self-contained file (inline CSS, PNG data URIs).

    Parameters
    ----------
    run_dir : Path
        A run folder scored by ``rehedge run`` (with metrics.json and heldout.npz).
    siblings : sequence of Path
        Other run folders of the same sweep; with any, the report adds the
        cost-risk frontier across the runs.
    staging : bool
        ``run_dir`` is the unfinished folder of the run writing it (see rehedge.runner).

    Returns
    -------
    Path
        The report file. A folder that is not a scored run raises ConfigError.
    """
    scored = load_scored(Path(run_dir), staging)
    others = [read_sibling(path) for path in siblings if Path(path).resolve() != scored.run.path.resolve()]
    config_order = [spec.name for spec in [*scored.run.config.baselines, *scored.run.config.agents]]
    names = [*config_order, *(r["name"] for r in scored.records if r["name"] not in config_order)]
    colors = colors_of(names)
    paths, seed = sample_path(scored)
    with matplotlib.rc_context(STYLE):
        figures = [("pnl", "P&L distribution", *pnl_figure(scored, colors))]
        labels = labels_of(scored.records)
        for name, uri, caption in map_figures(scored, paths.factors):
            figures.append((f"map-{name}", f"Policy map: {labels.get(name, name)}", uri, caption))
        figures.append(("cost", "Cost over time", *cost_figure(scored, colors)))
        figures.append(("path", "One held-out path", *path_figure(scored, paths, seed, colors)))
        if others:
            figures.append(("frontier", "Cost-risk frontier", *frontier_figure(scored, others, colors)))
    body = [
        f"<h1>rehedge report: {_e(scored.run.config.name)}</h1>",
        f'<p class="caution" id="caution"><strong>{_e(CAUTION)}</strong></p>',
        _scenario_html(scored),
        _summary_html(scored),
        "<h2>Figures</h2>",
        *(f"<h3>{_e(title)}</h3>{_figure_html(uri, caption, title, ident)}" for ident, title, uri, caption in figures),
    ]
    document = (
        '<!DOCTYPE html>\n<html lang="en"><head><meta charset="utf-8">'
        '<meta name="viewport" content="width=device-width, initial-scale=1">'
        f"<title>rehedge report: {_e(scored.run.config.name)}</title><style>{_CSS}</style></head>"
        f"<body>{''.join(body)}</body></html>\n"
    )
    target = scored.run.path / "report.html"
    target.write_text(document, encoding="utf-8")
    return target
