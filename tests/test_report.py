"""The HTML report (analysis.output.report) and the CLI ``report`` subcommand.

References: the effect statement is recomputed with ``analysis.models.effects`` from
the preferred fit of a direct ``fit_candidates`` call; the HTML is checked by
the standard library's ``html.parser`` with a tag-balance check written here.
"""
from __future__ import annotations

import re
from html.parser import HTMLParser

import pandas as pd
import pytest

from analysis.preparation.demo import demo_roles, demo_settings, load_demo
from analysis.models.effects import interaction_summary
from analysis.preparation.loading import Dataset
from analysis.models.modelling import fit_candidates
from analysis.models.modelstage import ModelChoices
from analysis.pipeline import Workbench
from analysis.output.report import CAUTIONS, build_report
from app.cli import main
from app.figures import report_figures

N_SUBJECTS = 180
VOID = {"area", "base", "br", "col", "embed", "hr", "img", "input", "link", "meta", "source",
        "track", "wbr"}


class StrictParser(HTMLParser):
    """Collects visible text and every nesting problem (unclosed or stray end tags)."""

    def __init__(self):
        super().__init__(convert_charrefs=True)
        self.stack: list[str] = []
        self.problems: list[str] = []
        self.text: list[str] = []
        self._skip = 0

    def handle_starttag(self, tag, attrs):
        if tag not in VOID:
            self.stack.append(tag)
        if tag in ("script", "style"):
            self._skip += 1

    def handle_endtag(self, tag):
        if tag in VOID:
            return
        if not self.stack or self.stack[-1] != tag:
            self.problems.append(f"</{tag}> closes {self.stack[-1:] or 'nothing'}")
            return
        self.stack.pop()
        if tag in ("script", "style"):
            self._skip -= 1

    def handle_data(self, data):
        if not self._skip:
            self.text.append(data)


def parse(text: str) -> StrictParser:
    p = StrictParser()
    p.feed(text)
    p.close()
    return p


@pytest.fixture(scope="module")
def demo_slice() -> pd.DataFrame:
    df = load_demo()
    keep = df["recipient_id"].drop_duplicates().iloc[:N_SUBJECTS]
    return df[df["recipient_id"].isin(keep)].reset_index(drop=True)


@pytest.fixture(scope="module")
def report(demo_slice):
    wb = Workbench()
    ds = Dataset.from_frame(demo_slice, name="slice.csv")
    roles, settings = demo_roles(), demo_settings()
    choices = ModelChoices(structures=("intercept", "intercept+slope"), gee=("exchangeable",))
    ex = wb.explore(ds, roles, settings)
    models = wb.models(ds, roles, settings, choices)
    text = build_report(ex.cohort, ex, models, data_name=ds.name, data_key=ds.key,
                        choices=choices, figures=report_figures(ex, models))
    return text, ex, models, ds


def test_report_parses_and_holds_the_cautions_and_attrition(report):
    text, ex, models, ds = report
    p = parse(text)
    assert p.problems == [] and p.stack == []
    visible = " ".join(p.text)
    for caution in CAUTIONS:
        assert visible.count(caution) >= 2          # top and bottom
    for step in ex.cohort.attrition.to_frame()["step"]:
        assert step in visible
    assert ds.key in visible and "slice.csv" in visible
    for w in ex.cohort.warnings:
        assert w in visible
    # settings, semivariogram caveat and every model name appear
    assert "variogram_bins" in visible and ex.variogram.caveat in visible
    for name in models.fits:
        assert name in visible
    # the figure's script is inlined (works offline): no script is fetched from elsewhere
    inlined = "Plotly.newPlot" in text and re.search(r"<script[^>]*\bsrc=", text) is None
    assert inlined


def test_report_effect_statement_is_the_one_from_analysis_effects(report, demo_slice):
    text, ex, models, ds = report
    # reference: fit_candidates called directly, then analysis.models.effects on its preferred fit
    direct = fit_candidates(ex.cohort, structures=("intercept", "intercept+slope"), gee=())
    fit = direct.fits[direct.preferred]
    s = ex.cohort.settings
    summary = interaction_summary(fit, term="time × x", transform=s.transform,
                                  covariate_label=f"baseline {ex.cohort.covariate}",
                                  response_label="egfr", time_unit=s.unit,
                                  response_unit=ex.cohort.response_unit)
    visible = " ".join(parse(text).text)
    assert summary.statement in visible
    assert summary.robust_statement in visible
    assert "not a causal effect" in summary.statement


def test_report_without_models(demo_slice):
    wb = Workbench()
    ds = Dataset.from_frame(demo_slice, name="slice.csv")
    ex = wb.explore(ds, demo_roles(), demo_settings())
    text = build_report(ex.cohort, ex, None, data_name="slice.csv", data_key=ds.key)
    p = parse(text)
    assert p.problems == [] and "No models were fitted for this report." in " ".join(p.text)
    assert wb.compute_counts["models"] == 0


ROLE_FLAGS = ["--subject", "recipient_id", "--time", "visit_date", "--response", "egfr",
              "--event-date", "tx_date", "--covariate", "urine_protein_ratio,age_at_tx",
              "--origin", "event-date", "--transform", "log2", "--center", "median"]


def test_cli_report_writes_a_file(tmp_path, demo_slice, capsys):
    csv = tmp_path / "slice.csv"
    demo_slice.to_csv(csv, index=False)
    out = tmp_path / "r.html"
    code = main(["report", str(csv), *ROLE_FLAGS, "--models", "intercept", "--out", str(out)])
    assert code == 0 and out.exists()
    text = out.read_text(encoding="utf-8")
    p = parse(text)
    assert p.problems == []
    visible = " ".join(p.text)
    assert all(c in visible for c in CAUTIONS) and "intercept (REML)" in visible
    assert "wrote" in capsys.readouterr().err


@pytest.mark.parametrize("extra, pattern", [
    (["--models", "bogus"], "structures ['bogus'] not known"),
    (["--confounders", "urine_protein_ratio"], "is the primary covariate"),
    (["--min-visits", "0"], "min_visits == 0, must be from 1 to 1000"),
])
def test_cli_report_bad_input_exits_2(tmp_path, demo_slice, capsys, extra, pattern):
    csv = tmp_path / "slice.csv"
    demo_slice.to_csv(csv, index=False)
    code = main(["report", str(csv), *ROLE_FLAGS, *extra, "--out", str(tmp_path / "r.html")])
    err = capsys.readouterr().err
    assert code == 2 and pattern in err and "Traceback" not in err
    assert not (tmp_path / "r.html").exists()


def test_cli_report_missing_roles_exits_2(tmp_path, demo_slice, capsys):
    csv = tmp_path / "slice.csv"
    demo_slice.to_csv(csv, index=False)
    code = main(["report", str(csv), "--out", str(tmp_path / "r.html")])
    assert code == 2 and "--subject" in capsys.readouterr().err


def test_report_dropout_part_says_what_the_page_says(demo_slice):
    from app.sections.followup import dropout_note

    wb = Workbench()
    ds = Dataset.from_frame(demo_slice, name="slice.csv")
    ex = wb.explore(ds, demo_roles(), demo_settings())
    d = ex.summaries.dropout
    visible = " ".join(parse(build_report(ex.cohort, ex, None, data_name="slice.csv")).text)
    # the same sentence as the page's note under the follow-up view
    page = dropout_note(d, time_unit="months")[0].children[1]
    assert page == d.sentence("months") and page in visible
    assert "Visits and loss to follow-up" in visible and d.status_rule in visible
    # reference: pandas crosstab of the per-subject statuses gives the counts the report lists
    tab = pd.crosstab(d.subjects["status"], "n")["n"]
    h = f"{d.horizon:.3g} months"
    assert f"{tab.get('left_early', 0):,} left before {h}" in visible
    assert f"{tab.get('complete', 0):,} followed to {h}" in visible
    assert f"{tab.get('censored', 0):,} had not reached {h} when the data end" in visible
