"""Component ids, one constant each (kebab-case, prefixed by the section they belong to)."""
from __future__ import annotations

from analysis.settings import DECLARED

# -- page-wide --------------------------------------------------------------
PAGE_URL = "page-url"
PAGE_TITLE = "page-title"
PAGE_CAUTION = "page-caution"
PAGE_CAUTION_CLOSE = "page-caution-close"
PAGE_ALERT = "page-alert"

# -- browser stores (keys and small settings only) ---------------------------
STORE_DATA = "store-data"            # {"key": str, "name": str}
STORE_ROLES = "store-roles"          # Roles.to_dict() or None
STORE_SETTINGS = "store-settings"    # Settings.to_dict() (valid) 
#: per analysis stage, the key of what its views draw from (data, roles, the stage's settings);
#: rewritten only when it changes, so a setting redraws only the views that depend on it
STAGE_KEY = {s: f"store-stage-{s}" for s in ("cohort", "summaries", "variogram", "lagcorr")}
STORE_SUBJECT = "store-subject"      # selected subject id (str) or None

# -- data section ------------------------------------------------------------
DATA_UPLOAD = "data-upload"
DATA_UPLOAD_MSG = "data-upload-msg"
DATA_UPLOAD_LIMIT = "data-upload-limit"
DATA_NAME = "data-name"
DATA_USE_DEMO = "data-use-demo"
DATA_PREVIEW = "data-preview"

# role mapping: one dropdown + message per role
ROLE_FIELDS = ("subject", "time", "event_date", "response", "covariates", "followup_end")
ROLE_INPUT = {r: f"roles-{r.replace('_', '-')}" for r in ROLE_FIELDS}
ROLE_MSG = {r: f"roles-{r.replace('_', '-')}-msg" for r in ROLE_FIELDS}
ROLES_STATUS = "roles-status"
#: roles whose column can carry a display label typed beside its dropdown (the covariates'
#: label names the primary, first, covariate)
LABEL_ROLES = ("time", "event_date", "response", "covariates")
ROLE_LABEL = {r: f"roles-{r.replace('_', '-')}-label" for r in LABEL_ROLES}

# -- settings panel: one control + one message per Settings field ------------
SETTING_FIELDS = tuple(DECLARED)     # every declared setting, in field order
SETTING_INPUT = {f: f"settings-{f.replace('_', '-')}" for f in SETTING_FIELDS}
SETTING_MSG = {f: f"settings-{f.replace('_', '-')}-msg" for f in SETTING_FIELDS}
SETTINGS_STATUS = "settings-status"
SETTINGS_RESET = "settings-reset"

# -- attrition -----------------------------------------------------------------
KEPT_TABLE = "kept-table"
KEPT_NOTES = "kept-notes"
STRATA_SIZE_NOTE = "strata-size-note"   # small-group warning beside the group controls

# -- stratum chips and the selected-subject card ---------------------------------
LINK_STRATA = "link-strata"
LINK_CLEAR = "link-clear"
LINK_CARD = "link-card"

# -- views -------------------------------------------------------------------
COURSE_GRAPH = "course-graph"
COURSE_DRAW = "course-draw"
COURSE_SEED = "course-seed"
COURSE_NOTE = "course-note"
COURSE_MSG = "course-msg"

SPREAD_GRAPH = "spread-graph"
SPREAD_READOUT = "spread-readout"
SPREAD_MSG = "spread-msg"

PAIRS_GRAPH = "pairs-graph"
PAIRS_NOTE = "pairs-note"
PAIRS_MSG = "pairs-msg"

LINES_GRAPH = "lines-graph"
LINES_ORDER = "lines-order"
LINES_MSG = "lines-msg"
LINES_MEMBERS = "lines-members"    # subjects of a clicked band (summarised view)

RATE_STRATA_GRAPH = "rate-strata-graph"
RATE_COVARIATE_GRAPH = "rate-covariate-graph"
RATE_TABLE = "rate-table"
RATE_MSG = "rate-msg"
RATE_MEMBERS = "rate-members"      # subjects of a clicked density cell

FOLLOW_VISITS_GRAPH = "follow-visits-graph"
FOLLOW_DROPOUT_GRAPH = "follow-dropout-graph"
FOLLOW_MSG = "follow-msg"
FOLLOW_NOTE = "follow-note"

MODELS_SECTION = "models-section"

#: every graph that carries subject ids in customdata (clicks select a subject)
SUBJECT_CLICK_GRAPHS = (COURSE_GRAPH, LINES_GRAPH, RATE_COVARIATE_GRAPH)

SETTING_CENTER_VALUE = "settings-center-value"
SETTINGS_DATA_MSG = "settings-data-msg"

#: per-view store of the key its figure was last drawn for (skip redraws that change nothing)
VIEW_RENDERED = {v: f"{v}-rendered" for v in ("kept", "course", "spread", "pairs", "lines",
                                              "rate", "follow", "link")}
#: the SVG export button of a graph (pattern-matching id, index = graph id)
EXPORT_SVG = "export-svg"

# -- models section (candidate covariance structures, comparison, effect, report) ------
MODELS_STRUCTURES = "models-structures"
MODELS_CORRELATION = "models-correlation"
MODELS_METHOD = "models-method"
MODELS_CONFOUNDERS = "models-confounders"
MODELS_SPLINE_DF = "models-spline-df"
MODELS_FIT = "models-fit"
MODELS_STATUS = "models-status"       # live note: choices invalid / results out of date
MODELS_MSG = "models-msg"             # fitting errors
MODELS_SUMMARY = "models-summary"     # effect statement, comparison, LRTs, GEE rows, notes
MODELS_GRAPH = "models-graph"
MODELS_CHOSEN = "models-chosen"       # model whose fixed effects / variance parameters show
MODELS_DETAIL = "models-detail"
MODELS_SNAPSHOT = "models-snapshot"   # store: {"key", "data", "roles", "settings", "choices"}
MODELS_EXPORT = "models-export"
MODELS_EXPORT_MSG = "models-export-msg"
MODELS_DOWNLOAD = "models-download"
