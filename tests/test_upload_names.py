"""The same content uploaded under two names: each session shows its own file name.

Reference: the file names the test itself gives the two uploads.
"""
from __future__ import annotations

import base64

from analysis.preparation.demo import demo_roles, load_demo
from app import controls as ctl
from app import hub
from app.server import create_app


def _contents(frame) -> str:
    return "data:text/csv;base64," + base64.b64encode(frame.to_csv(index=False).encode()).decode()


def _session_upload(context, contents, filename):
    out = hub._unchanged({"data": 0, "title": 0, "data_name": 0, "upload_msg": 0, "preview": 0,
                          "preview_cols": 0, "role_options": 0, "roles": 0, "subject": 0,
                          "stratum": 0, "covariate_options": 0})
    now = {"roles": ctl.role_values(demo_roles()), "data": None, "subject": None, "stratum": None}
    assert hub._from_upload(context, contents, filename, now, out)
    return out


def test_same_content_under_two_names_keeps_each_sessions_name():
    context = create_app()._cohortlens
    df = load_demo()
    contents = _contents(df[df["recipient_id"].isin(df["recipient_id"].unique()[:30])])
    first = _session_upload(context, contents, "alpha_registry.csv")
    second = _session_upload(context, contents, "beta_export.csv")
    assert first["data"]["key"] == second["data"]["key"]          # one stored table
    assert second["data"]["name"] == "beta_export.csv"
    assert second["title"] == "beta_export.csv"
    assert second["data_name"].startswith("beta_export.csv:")
    assert "alpha" not in repr(second)
    # the shared store keeps no session's file name
    assert "alpha" not in context.datasets.get(first["data"]["key"]).name

    # a page reload from a link keeps this session's own name
    out = hub._unchanged({"data": 0, "title": 0, "data_name": 0, "upload_msg": 0, "preview": 0,
                          "preview_cols": 0, "role_options": 0, "roles": 0, "subject": 0,
                          "stratum": 0, "covariate_options": 0, "settings": 0, "view": 0,
                          "alert": 0})
    hub._from_url(context, f"?data={second['data']['key']}", out, current=second["data"])
    assert out["data"]["name"] == "beta_export.csv"

    # the exported report is named after, and names, this session's file
    from app.sections.models import report_text

    roles = {"roles": demo_roles().to_dict()}
    fname, html = report_text(context, second["data"], roles, None, None)
    assert fname == "cohortlens-report-beta_export.html"
    assert "beta_export.csv" in html and "alpha_registry" not in html
