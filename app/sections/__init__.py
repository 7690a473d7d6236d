"""The page sections, one module each, in page order.

Every section module has ``ANCHOR`` and ``NAV`` (its id on the page and its label in the
navigation; both ``None`` for the groups bar, which has no entry), ``layout(settings,
max_upload_bytes)`` returning its part of the page, and ``register(app, context)`` adding
its callbacks. :mod:`app.layout` assembles the page from :data:`SECTIONS` and
:mod:`app.server` registers each; adding a section is its module plus one line here
(see DEVELOPERS.md, "Adding a view").
"""
from __future__ import annotations

from . import (courses, data, followup, kept, lagcorr, lines, models, plan, rate, selection,
               semivariogram)

#: page order
SECTIONS = (
    data,
    kept,
    selection,
    courses,
    semivariogram,
    lagcorr,
    lines,
    rate,
    followup,
    models,
    plan,
)
