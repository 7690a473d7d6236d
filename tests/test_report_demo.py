"""The exported report on the whole demo registry: its figures, one copy of the plotting library,
its size, and no internal keys in what a reader sees.

References: the standard library's ``html.parser`` reads the file; the list of internal keys is
built from the dataclass fields of ``Settings``, ``Roles`` and ``ModelChoices`` and from the
column names of the frames the report is made from (pandas), not typed out here.
"""
from __future__ import annotations

import json
import re
from dataclasses import fields
from html.parser import HTMLParser

import pytest

from analysis.models.modelstage import ModelChoices
from analysis.preparation.demo import demo_roles, demo_settings
from analysis.settings import Roles, Settings
from app.cli import main

#: the issue's limit for the demo report
MAX_BYTES = 2 * 1024 * 1024
#: the figures the report must hold, by a piece of each figure's title (app/figures.py)
FIGURE_TITLES = {
    "courses by group": " over time, by ",
    "semivariogram": "Semivariogram of within-subject residuals",
    "semivariogram with fitted curves": "fitted semivariograms against the empirical one",
    "subject slope intervals": "Each subject's slope with its 95% interval",
    "slope against covariate": "Subject slope against ",
    "retention (Kaplan–Meier)": "Loss to follow-up, by group",
    "model check: residuals by fitted value": "Standardised residuals by fitted value",
    "model check: residuals by time": "Standardised residuals by time",
    "model check: residual quantiles": "Residuals against the normal",
    "model check: random-effect quantiles": "Random effects against the normal",
    "model check: one subject": "One subject: visits and predicted course",
}


class ReportParser(HTMLParser):
    """Visible text, script bodies and the nesting of figures."""

    def __init__(self):
        super().__init__(convert_charrefs=True)
        self.text: list[str] = []
        self.scripts: list[str] = []
        self.script_src: list[str] = []
        self.figures = 0
        self.graphs_in_figures = 0
        self._in: list[str] = []

    def handle_starttag(self, tag, attrs):
        a = dict(attrs)
        if tag == "script":
            self.scripts.append("")
            if a.get("src"):
                self.script_src.append(a["src"])
        if tag == "figure":
            self.figures += 1
        if tag == "div" and "plotly-graph-div" in (a.get("class") or "") and "figure" in self._in:
            self.graphs_in_figures += 1
        if tag in ("script", "style", "figure"):
            self._in.append(tag)

    def handle_endtag(self, tag):
        if tag in ("script", "style", "figure") and self._in and self._in[-1] == tag:
            self._in.pop()

    def handle_data(self, data):
        if "script" in self._in:
            self.scripts[-1] += data
        elif "style" not in self._in:
            self.text.append(data)


@pytest.fixture(scope="module")
def demo_report(tmp_path_factory):
    out = tmp_path_factory.mktemp("report") / "demo.html"
    assert main(["report", "demo", "--out", str(out)]) == 0
    raw = out.read_bytes()
    p = ReportParser()
    p.feed(raw.decode("utf-8"))
    p.close()
    return raw, p


def _titles(scripts: list[str]) -> list[str]:
    """Every text of the Plotly.newPlot calls' layout JSON (titles, axis titles, annotations)."""
    out = []
    for s in scripts:
        for m in re.finditer(r'"text":"((?:[^"\\]|\\.)*)"', s):
            out.append(json.loads(f'"{m.group(1)}"'))
    return out


def test_demo_report_holds_every_key_figure(demo_report):
    raw, p = demo_report
    titles = _titles([s for s in p.scripts if "Plotly.newPlot" in s])
    missing = [name for name, piece in FIGURE_TITLES.items()
               if not any(piece in t for t in titles)]
    assert missing == []
    # every figure is a drawn graph inside a <figure> with a caption
    assert p.graphs_in_figures == p.figures >= len(FIGURE_TITLES)


def test_demo_report_inlines_the_plotting_library_once_and_stays_small(demo_report):
    raw, p = demo_report
    # a plotly.js bundle starts with its licence banner "* plotly.js ..." (once per copy)
    banners = sum(len(re.findall(r"\*\s*plotly\.js\b", s)) for s in p.scripts)
    assert banners == 1
    defines = sum(s.count("var Plotly=") for s in p.scripts)
    assert defines <= 1
    # opens offline: no script or style sheet is fetched from elsewhere
    assert p.script_src == [] and re.search(rb"<link[^>]+href=", raw) is None
    assert len(raw) < MAX_BYTES, f"{len(raw):,} bytes"
    # the inlined bundle draws no WebGL traces, so none may be asked for
    assert not any('"type":"scattergl"' in s for s in p.scripts)


def _internal_keys() -> set[str]:
    """Field and column names a reader should never see: every Settings, Roles and
    ModelChoices field, and the columns of the frames the report is made from."""
    from analysis.preparation.loading import Dataset
    from analysis.pipeline import Workbench
    from analysis.preparation.demo import load_demo

    keys = {f.name for f in fields(Settings)} | {f.name for f in fields(Roles)} \
        | {f.name for f in fields(ModelChoices)}
    wb = Workbench()
    ds = Dataset.from_frame(load_demo(), name="demo")
    ex = wb.explore(ds, demo_roles(), demo_settings())
    frames = [ex.summaries.stratum_table, ex.cohort.attrition.to_frame(), ex.variogram.bins,
              ex.summaries.dropout.count_table, ex.summaries.dropout.retention,
              ex.subject_lines, ex.cohort.baseline]
    for f in frames:
        keys |= {str(c) for c in f.columns}
    from analysis.models.mixed.structures import PARAMETER_ORDER
    keys |= set(PARAMETER_ORDER)
    # plain words are fine in a sentence ("unit", "subjects", "breaks"); an internal key is a
    # name joined by underscores, which no sentence of the report uses
    return {k for k in keys if "_" in k}


def test_demo_report_shows_no_internal_keys(demo_report):
    raw, p = demo_report
    visible = " ".join(p.text)
    keys = _internal_keys()
    assert {"require_covariate", "cov_q1", "slope_n", "intercept_var"} <= keys   # the list is live
    leaked = sorted(k for k in keys if re.search(rf"(?<![\w.]){re.escape(k)}(?![\w.])", visible))
    # column names of the user's own file are data, not keys: the roles table names them
    columns = {v for v in demo_roles().to_dict().values() if isinstance(v, str)}
    columns |= set(demo_roles().covariates)
    leaked = [k for k in leaked if k not in columns]
    assert leaked == []
    # group codes (negative for "no value" and "all subjects") never appear as numbers
    assert re.search(r"(?<![\w.−-])-[12](?![\w.])", visible) is None
