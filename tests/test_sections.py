"""The page is assembled from one module per section, without import cycles.

Reference: the interpreter's own module table (``sys.modules``) in fresh subprocesses, and the
component tree Dash serves (``app.layout()``) with the callback map it registered.
"""
from __future__ import annotations

import json
import pkgutil
import subprocess
import sys
import types

from dash import Input, Output, html

import app
import app.sections as sections
from app import layout as page_layout
from app import server
from app.views import rendered_id, rendered_store

APP_MODULES = sorted(m.name for m in pkgutil.walk_packages(app.__path__, "app."))

SCRIPT = r"""
import importlib, json, sys
importlib.import_module(sys.argv[1])
print(json.dumps(sorted(m for m in sys.modules if m.split('.')[0] in ('app', 'dash', 'flask'))))
"""
#: each app module imported on its own (every app module forgotten before the next one;
#: third-party packages stay loaded, for speed): {module: app modules it loaded}
EACH_ALONE = r"""
import importlib, json, sys
out = {}
for name in sys.argv[1:]:
    for m in [m for m in sys.modules if m == 'app' or m.startswith('app.')]:
        del sys.modules[m]
    importlib.import_module(name)
    out[name] = sorted(m for m in sys.modules if m.startswith('app.'))
print(json.dumps(out))
"""


def _loaded(module: str) -> set[str]:
    """Modules in ``sys.modules`` after importing ``module`` alone in a fresh interpreter."""
    out = subprocess.run([sys.executable, "-c", SCRIPT, module], capture_output=True, text=True,
                         check=True).stdout
    return set(json.loads(out))


def test_every_app_module_imports_alone_and_sections_do_not_import_the_page():
    assert len(APP_MODULES) >= 20 and "app.sections.models" in APP_MODULES
    names = [n for n in APP_MODULES if n != "app.__main__"]
    out = subprocess.run([sys.executable, "-c", EACH_ALONE, *names], capture_output=True,
                         text=True, check=True).stdout
    loaded = json.loads(out)
    assert set(loaded) == set(names)          # every module imported without an error
    for name in names:
        if name.startswith("app.sections."):
            # the page imports the sections, never the other way round
            assert not {"app.layout", "app.server"} & set(loaded[name]), name
    assert "app.layout" not in loaded["app.sections.models"]


def test_figure_style_and_report_figure_load_no_web_framework():
    loaded = _loaded("app.figures")
    assert not {m for m in loaded if m.split(".")[0] in ("dash", "flask")}


def _ids(component) -> list[str]:
    out = []
    if isinstance(component, (list, tuple)):
        for c in component:
            out += _ids(c)
        return out
    cid = getattr(component, "id", None)
    if isinstance(cid, str):
        out.append(cid)
    children = getattr(component, "children", None)
    if children is not None and not isinstance(children, str):
        out += _ids(children)
    return out


def test_every_section_module_is_registered_once_in_page_order():
    names = {m.name for m in pkgutil.iter_modules(sections.__path__)}
    assert names == {m.__name__.rsplit(".", 1)[1] for m in sections.SECTIONS}
    for m in sections.SECTIONS:
        assert callable(m.layout) and callable(m.register) and hasattr(m, "NAV"), m.__name__
    dash_app = server.create_app()
    ids = _ids(dash_app.layout())
    anchors = [m.ANCHOR for m in sections.SECTIONS if m.ANCHOR]
    # the sections appear in the registered order, and the navigation lists them in it
    assert [i for i in ids if i in anchors] == anchors
    assert [a for a, _ in page_layout.SECTIONS] == anchors


def test_a_new_section_needs_only_its_module_and_the_registration(monkeypatch):
    """What DEVELOPERS.md "Adding a view" says: a module with ANCHOR, NAV, layout and register,
    plus its line in app.sections.SECTIONS — no other file."""
    extra = types.ModuleType("app.sections.example")
    extra.ANCHOR, extra.NAV = "section-example", "Example"
    extra.layout = lambda settings=None, max_upload_bytes=None: html.Section(
        id="section-example", children=[html.Button(id="example-go"), html.Div(id="example-out"),
                                        rendered_store("example")])

    def register(app_, context):
        @app_.callback(Output("example-out", "children"), Input("example-go", "n_clicks"))
        def go(n):
            return str(n)
    extra.register = register
    monkeypatch.setattr(sections, "SECTIONS", (*sections.SECTIONS, extra))
    monkeypatch.setattr(page_layout, "PAGE_SECTIONS", sections.SECTIONS)
    monkeypatch.setattr(server, "SECTIONS", sections.SECTIONS)
    dash_app = server.create_app()
    tree = dash_app.layout()
    ids = _ids(tree)
    assert "section-example" in ids and rendered_id("example") in ids
    nav = [a.href for a in _find_nav(tree)]
    assert nav[-1] == "#section-example"
    assert any("example-out.children" in k for k in dash_app.callback_map)


def _find_nav(component):
    if isinstance(component, html.Nav):
        return component.children
    children = getattr(component, "children", None)
    for c in (children if isinstance(children, (list, tuple)) else [children]):
        if c is not None and not isinstance(c, str):
            found = _find_nav(c)
            if found is not None:
                return found
    return None
