"""The HTML report of a run folder: self-contained, cautions first, numbers exactly those of metrics.json."""

from __future__ import annotations

import csv
import json
import os
import re
from html.parser import HTMLParser
from pathlib import Path

import numpy as np
import pytest

from agents.band import NO_TRADE_TOLERANCE
from agents.baselines import DeltaHedge, FixedBand
from agents.registry import AGENTS, BASELINES
from rehedge.compare import evaluate_with_quotes, write_metrics
from rehedge.config import load_variants
from rehedge.errors import RunFolderError
from rehedge.formats import CAUTION, format_money, metric_columns, money_formatter
from rehedge.report import build_report
from rehedge.report.figures import _band_departure, _departure_text, policy_map
from rehedge.report.scored import policy_label
from rehedge.run_folder import load_run, write_run
from rehedge.training import train

# Two variants (10 and 50 bps) of a short 8-day call: seconds to train and score.
from tests import browser
from tests.scenarios import TINY

VOID = {"area", "base", "br", "col", "embed", "hr", "img", "input", "link", "meta", "source", "track", "wbr"}


class StrictParser(HTMLParser):
    """Collects tags, attributes, table cells and text; records every end tag that closes the wrong element."""

    def __init__(self) -> None:
        super().__init__(convert_charrefs=True)
        self.open: list[str] = []
        self.mismatches: list[str] = []
        self.tags: list[tuple[str, dict]] = []
        self.text: list[str] = []
        self.rows: list[dict] = []  # summary rows merged per policy: {"policy": name, key: cell text}
        self._row: dict | None = None
        self._cell_key: str | None = None

    def handle_starttag(self, tag, attrs):
        attributes = dict(attrs)
        self.tags.append((tag, attributes))
        if tag not in VOID:
            self.open.append(tag)
        if tag == "tr" and "data-policy" in attributes:
            self._row = {"policy": attributes["data-policy"]}
        if tag == "td" and self._row is not None:
            self._cell_key = attributes.get("data-key")
            if self._cell_key:
                self._row[self._cell_key] = ""
                self._row[self._cell_key + "@value"] = attributes.get("data-value")

    def handle_startendtag(self, tag, attrs):
        self.tags.append((tag, dict(attrs)))

    def handle_endtag(self, tag):
        if tag in VOID:
            return
        if not self.open or self.open[-1] != tag:
            self.mismatches.append(f"</{tag}> closes {self.open[-1] if self.open else 'nothing'}")
        else:
            self.open.pop()
        if tag == "td":
            self._cell_key = None
        if tag == "tr" and self._row is not None:
            # The summary is several tables with a row per policy in each: one row per policy here.
            same = [row for row in self.rows if row["policy"] == self._row["policy"]]
            if same:
                same[0].update(self._row)
            else:
                self.rows.append(self._row)
            self._row = None

    def handle_data(self, data):
        self.text.append(data)
        if self._row is not None and self._cell_key:
            self._row[self._cell_key] += data


def parse(path: Path) -> StrictParser:
    parser = StrictParser()
    parser.feed(path.read_text(encoding="utf-8"))
    parser.close()
    return parser


@pytest.fixture(scope="module")
def runs(tmp_path_factory) -> list[Path]:
    folder = tmp_path_factory.mktemp("report")
    config_file = folder / "tiny.toml"
    config_file.write_text(TINY)
    out = []
    for config in load_variants(config_file):
        training = train(config)
        run_dir = write_run(training, TINY, folder / "runs")
        evaluation = evaluate_with_quotes(
            training.problem, training.policies, training.market, config.data.heldout_paths,
            config.data.heldout_seed, kinds=training.kinds, chunk_paths=config.data.chunk_paths,
            reference="delta", bootstrap_samples=config.report.bootstrap_samples,
        )
        write_metrics(evaluation, run_dir)
        out.append(run_dir)
    return out


@pytest.fixture(scope="module")
def report(runs) -> Path:
    return build_report(runs[0])


@pytest.fixture(scope="module")
def report_with_siblings(runs, tmp_path_factory) -> Path:
    return build_report(runs[1], [runs[0]])


def test_report_is_written_in_the_run_folder_as_report_html(runs, report):
    assert report == runs[0] / "report.html"
    assert report.is_file()


def test_report_is_well_formed_html_with_head_body_and_a_table(report):
    parser = parse(report)
    assert parser.mismatches == []
    assert parser.open == []
    tags = {tag for tag, _ in parser.tags}
    assert {"html", "head", "body", "table", "style"} <= tags
    assert report.read_text(encoding="utf-8").startswith("<!DOCTYPE html>")


def test_report_is_self_contained_png_data_uris_no_urls_no_external_scripts(report):
    parser = parse(report)
    images = [attributes for tag, attributes in parser.tags if tag == "img"]
    # P&L, three policy maps (linear, fitted_q, grid_dp), cost over time, one sample path.
    assert len(images) == 6
    assert all(image["src"].startswith("data:image/png;base64,") for image in images)
    for _, attributes in parser.tags:
        for name in ("src", "href"):
            value = attributes.get(name) or ""
            assert "http://" not in value and "https://" not in value
    assert [a for tag, a in parser.tags if tag == "script" and "src" in a] == []
    assert [tag for tag, a in parser.tags if tag == "link"] == []
    assert "@import" not in report.read_text(encoding="utf-8")
    assert report.stat().st_size <= 3 * 1024 * 1024


def test_cautions_come_first_in_the_body(report):
    text = re.sub(r"\s+", " ", "".join(parse(report).text))
    assert CAUTION.startswith("Decision support, not advice: a policy is only as good as the market model")
    assert "the rules that apply where you trade" in CAUTION
    position = text.index(CAUTION)
    assert position < text.index("Scenario") < text.index("Summary")


def test_scenario_names_config_seeds_created_time_and_config_hash(runs, report):
    manifest = json.loads((runs[0] / "manifest.json").read_text())
    metrics = json.loads((runs[0] / "metrics.json").read_text())
    text = re.sub(r"\s+", " ", "".join(parse(report).text))
    assert "report-test-costrate0.001" in text
    assert manifest["created"] in text
    assert manifest["config_hash"] in text
    assert f"800 held-out paths, seed {metrics['heldout_seed']}" in text
    # A short call: its Black-Scholes mark is the premium the desk received.
    assert "(currency): the premium received for the book the desk has sold" in text
    assert f"200 paired resamples over paths, seed {metrics['bootstrap_seed']}" in text
    assert "10 bps of traded notional" in text


def test_summary_objectives_are_the_metrics_json_values_formatted_in_rank_order(runs, report):
    metrics = json.loads((runs[0] / "metrics.json").read_text())
    rows = parse(report).rows
    assert [row["policy"] for row in rows] == [record["name"] for record in metrics["policies"]]
    # Each money column in one number of decimals, the one its largest value needs.
    shown = {key: money_formatter([record[key] for record in metrics["policies"]])
             for key in ("objective", "cvar_95", "quote_ask")}
    for row, record in zip(rows, metrics["policies"]):
        assert row["objective"] == shown["objective"](record["objective"])
        # The cell carries the unrounded value too: the very float of metrics.json.
        assert float(row["objective@value"]) == record["objective"]
        assert float(row["vs_reference_mean@value"]) == record["vs_reference"]["mean"]
        assert row["cvar_95"] == shown["cvar_95"](record["cvar_95"])
        assert row["quote_ask"] == shown["quote_ask"](record["quote_ask"])
        # Every measure of metrics.json is in one of the summary's tables; an interval's bounds share a cell.
        keys = {re.sub(r"_ci_(low|high)$", "_ci", column.key) for column in metric_columns(record)}
        assert keys <= set(row)
        low, high = map(float, row["cvar_95_ci@value"].split())
        assert (low, high) == (record["cvar_95_ci_low"], record["cvar_95_ci_high"])
        assert low <= record["cvar_95"] <= high


def test_metrics_csv_objectives_equal_metrics_json(runs):
    metrics = json.loads((runs[0] / "metrics.json").read_text())
    with open(runs[0] / "metrics.csv", newline="") as handle:
        from_csv = {row["policy"]: float(row["objective"]) for row in csv.DictReader(handle)}
    assert from_csv == {record["name"]: record["objective"] for record in metrics["policies"]}


def test_money_format_matches_the_command_line_rules():
    assert format_money(-1234.567) == "-1,235"
    assert format_money(12.3456) == "12.35"
    assert format_money(-0.21046) == "-0.21"
    assert format_money(float("nan")) == "n/a"


def test_report_without_siblings_has_no_frontier(report):
    assert 'id="frontier"' not in report.read_text(encoding="utf-8")


def test_report_with_a_sibling_run_adds_the_cost_risk_frontier(runs, report_with_siblings):
    parser = parse(report_with_siblings)
    assert parser.mismatches == []
    frontier = [a for tag, a in parser.tags if tag == "figure" and a.get("id") == "frontier"]
    assert len(frontier) == 1
    images = [a for tag, a in parser.tags if tag == "img"]
    assert len(images) == 7
    text = "".join(parser.text)
    assert "cost_rate=0.001" in text and "cost_rate=0.005" in text
    assert runs[0].name in text and runs[1].name in text


def test_no_figure_cuts_a_legend_a_label_or_a_title(runs, monkeypatch):
    # A PNG cannot be laid out by the browser test, so each figure is checked as it is saved: every
    # legend and every axes' title, labels and tick labels lie inside the figure (the demo's cost and
    # path legends ran past both edges).
    from rehedge.report import figures

    saved = []
    encode = figures._png_data_uri
    monkeypatch.setattr(figures, "_png_data_uri", lambda figure: saved.append(figure) or encode(figure))
    build_report(runs[1], [runs[0]])
    assert len(saved) == 7
    for figure in saved:
        assert figures.cut_parts(figure) == [], figure.axes[0].get_title(loc="left")


def _sweep_variant(cost: float, aversion: float, seed: int, mean_cost: float) -> tuple:
    record = {"name": "delta", "std_pnl": 10.0 * aversion + seed, "cvar_95": 1.0, "mean_cost": mean_cost,
              "mean_impact": 0.0}
    config = {"seed": seed, "frictions": {"cost_rate": cost}, "objective": {"risk_aversion": aversion}}
    return Path(f"cell-{cost}-{aversion}-{seed}"), {"policies": [record]}, config


def test_the_frontier_averages_each_setting_over_its_seeds_and_joins_settings_along_the_cost():
    # A sweep of 2 costs x 2 risk aversions x 2 seeds has 4 settings, each the mean of its 2 seeds'
    # runs; a line joins the costs at one risk aversion, never a cell of another seed or aversion.
    from rehedge.report.figures import frontier_of

    variants = [_sweep_variant(cost, aversion, seed, 100 * cost + seed)
                for seed in (2, 1) for aversion in (0.004, 0.001) for cost in (0.002, 0.0005)]
    frontier = frontier_of(variants, ["frictions.cost_rate", "objective.risk_aversion", "seed"])
    assert frontier.keys == ("frictions.cost_rate", "objective.risk_aversion") and frontier.seeds == 2
    lines = frontier.lines()
    assert [others for others, _ in lines] == [(0.001,), (0.004,)]
    for others, settings in lines:
        assert [s.values for s in settings] == [(0.0005, others[0]), (0.002, others[0])]
        for setting in settings:
            assert len(setting.runs) == 2
            assert setting.mean("delta", "std_pnl") == pytest.approx(10.0 * others[0] + 1.5)
            assert setting.mean("delta", "mean_cost") == pytest.approx(100 * setting.values[0] + 1.5)
    assert frontier.label(lines[0][1][0]) == "cost_rate=0.0005, risk_aversion=0.001"


def test_policy_map_finds_the_whalley_wilmott_band_as_its_no_trade_region(runs):
    # The band is known in closed form (Whalley and Wilmott, 1997, as coded in agents.baselines): the
    # search (agents.band, bisection on the policy) must find its edges to within the no-trade
    # tolerance, a trade of 1e-7 of notional that counts as none.
    run = load_run(runs[0])
    band, problem = run.baselines["whalley_wilmott"], run.problem
    spot = np.linspace(96.0, 104.0, 9)
    decisions = policy_map(problem, band, spot, k=4)  # in shares
    notional = problem.notional_shares
    half_width = band.half_width_shares(spot, problem.schedule.time_days(4))
    assert (half_width > 1e-3 * notional).all()
    np.testing.assert_array_equal(decisions["target"], decisions["hedge"])
    for found in (decisions["hedge"] - decisions["no_trade_low"], decisions["no_trade_high"] - decisions["hedge"]):
        np.testing.assert_allclose(found, half_width, rtol=0, atol=1.01 * NO_TRADE_TOLERANCE * notional)


def test_band_departure_measures_how_far_a_no_trade_region_is_from_the_band(runs):
    # A fixed band of half-width h (per share of notional) around the same hedge is a no-trade
    # region whose edges are |h * notional - w(S)| from the Whalley-Wilmott band's of half-width w(S).
    run = load_run(runs[0])
    problem, band = run.problem, run.baselines["whalley_wilmott"]
    notional, spot = problem.notional_shares, np.linspace(96.0, 104.0, 9)
    half_width = band.half_width_shares(spot, problem.schedule.time_days(4))
    assert _band_departure(policy_map(problem, band, spot, k=4), half_width) <= 1.01 * NO_TRADE_TOLERANCE * notional
    fixed = FixedBand(problem, half_width=0.3)
    expected = np.abs(0.3 * notional - half_width).max()
    np.testing.assert_allclose(_band_departure(policy_map(problem, fixed, spot, k=4), half_width), expected,
                               rtol=0, atol=1.01 * NO_TRADE_TOLERANCE * notional)


def test_map_caption_says_where_the_agent_leaves_the_band_by_more_than_a_holding_node():
    inside = _departure_text([(1.0, 20.0), (4.0, 35.0)], 40.0, "Whalley-Wilmott band")
    assert "stay within one holding node of its hedge table (40 shares)" in inside
    outside = _departure_text([(1.0, 20.0), (4.0, 55.0), (7.0, 90.0)], 40.0, "Whalley-Wilmott band")
    assert "leaves the Whalley-Wilmott band by more than one holding node" in outside
    assert "day 4 (55 shares), day 7 (90 shares)" in outside and "day 1 " not in outside


def test_every_map_caption_compares_the_agent_with_the_band(report):
    captions = re.findall(r'<figure id="map-[^"]+">.*?<figcaption>(.*?)</figcaption>',
                          report.read_text(encoding="utf-8"), flags=re.S)
    assert len(captions) == 3
    for caption in captions:
        assert "holding node of its hedge table" in caption
        assert "(shares)" in caption


def test_policies_are_named_by_readable_labels():
    assert policy_label("whalley_wilmott", "whalley_wilmott") == "Whalley-Wilmott band"
    assert policy_label("no_hedge", "no_hedge") == "no hedge"
    assert policy_label("wide", "fixed_band") == "wide (fixed band)"
    assert policy_label("table:linear", "") == "table:linear"
    for kind, cls in {**BASELINES, **AGENTS}.items():
        assert isinstance(cls.label, str) and cls.label != kind and "_" not in cls.label


def test_summary_names_policies_by_their_labels(runs, report):
    metrics = json.loads((runs[0] / "metrics.json").read_text())
    rows = parse(report).rows
    assert [row["name"] for row in rows] == [policy_label(r["name"], r["kind"]) for r in metrics["policies"]]
    assert "Whalley-Wilmott band" in {row["name"] for row in rows}


def test_policy_map_of_delta_hedging_keeps_only_the_hedge(runs):
    run = load_run(runs[0])
    spot = np.linspace(96.0, 104.0, 9)
    decisions = policy_map(run.problem, DeltaHedge(run.problem), spot, k=4)
    atol = 1.01 * NO_TRADE_TOLERANCE * run.problem.notional_shares
    np.testing.assert_allclose(decisions["no_trade_low"], decisions["hedge"], rtol=0, atol=atol)
    np.testing.assert_allclose(decisions["no_trade_high"], decisions["hedge"], rtol=0, atol=atol)


def test_folder_without_metrics_is_a_one_line_run_folder_error(runs, tmp_path):
    unscored = tmp_path / "unscored"
    unscored.mkdir()
    for name in ("config.json", "manifest.json", "config.toml"):
        (unscored / name).write_text((runs[0] / name).read_text())
    (unscored / "agents").symlink_to(runs[0] / "agents")
    with pytest.raises(RunFolderError, match=r"no held-out scores \(metrics\.json\)") as error:
        build_report(unscored)
    assert "\n" not in str(error.value)


@pytest.fixture(scope="module")
def chromium():
    if browser.chromium() is None:
        if os.environ.get(browser.REQUIRE_ENVIRONMENT):
            pytest.fail("no chromium on this machine (.ci/run installs the Debian package)")
        pytest.skip("no chromium on this machine (apt-get install chromium)")
    return browser.chromium()


def _png_width(path: Path) -> int:
    header = path.read_bytes()[:24]
    assert header[:8] == b"\x89PNG\r\n\x1a\n"
    return int.from_bytes(header[16:20], "big")


def test_report_in_headless_chromium_fits_1400_px_and_shows_every_image(chromium, report):
    # Common practice, no source: a desk head reads the report on a 1,400 px wide window; every
    # summary column must be visible there without scrolling sideways, and at 800 px the page must
    # still load. Screenshots are kept under the run folder for a person to look at.
    for width in (1400, 800):
        seen = browser.layout(report, width)
        assert seen["window_width"] == width
        assert len(seen["images"]) == 6
        for image in seen["images"]:
            assert image["complete"] and image["natural_width"] > 0, f"{image['alt']} did not load at {width} px"
        if width == 1400:
            assert seen["document_width"] <= width, "the page scrolls sideways at 1,400 px"
            assert len(seen["tables"]) >= 3
            for table in seen["tables"]:
                assert 0 <= table["left"] and table["right"] <= width, f"a summary table overflows: {table}"
        shot = browser.screenshot(report, width, seen["document_height"],
                                  report.parent / "screenshots" / f"report-{width}.png")
        assert _png_width(shot) == width


def test_browser_check_catches_a_wide_table_and_a_broken_image(chromium, tmp_path):
    page = tmp_path / "bad.html"
    page.write_text('<!DOCTYPE html><html><body><table class="summary"><tr><td style="min-width:3000px">wide'
                    '</td></tr></table><img alt="broken" src="data:image/png;base64,AAAA"></body></html>')
    seen = browser.layout(page, 1400)
    assert seen["document_width"] > 1400 and seen["tables"][0]["right"] > 1400
    assert seen["images"][0]["natural_width"] == 0


def test_the_config_currency_names_every_money_header():
    # A `currency` key (default "currency units") appears in every money header.
    from rehedge.formats import metric_columns as columns_of

    record = {"objective": 1.0, "mean_pnl": 1.0, "std_pnl": 1.0, "var_95": 1.0, "cvar_95": 1.0, "entropic_risk": 1.0,
              "mean_cost": 1.0, "mean_impact": 1.0, "quote_bid": 1.0, "quote_ask": 1.0, "turnover": 1.0}
    money = [c for c in columns_of(record, "EUR") if c.format is format_money]
    assert money and all("EUR" in c.long for c in money)
    assert "higher is better" in next(c.long for c in money if c.key == "objective")
