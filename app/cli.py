"""Command line: ``cohortlens [serve] | summarize | fit | report``.

``serve`` (the default) opens the dashboard; ``summarize`` and ``fit`` run the
same analysis layer headless and write JSON; ``report`` writes one
self-contained HTML report. Bad input exits with status 2 and
the same message the dashboard would show.
"""
from __future__ import annotations

import argparse
import json
import re
import sys
from pathlib import Path

from analysis import options as opt
from analysis.errors import CohortError, SettingsError
from analysis.settings import DECLARED, Roles, Settings, default_text

COMMANDS = ("serve", "summarize", "fit", "report", "plan", "partition")

#: (flag, Settings field, type, choices, help) of every setting that takes a value, read from
#: its declaration (analysis.settings); the help ends with the default in brackets
SETTING_FLAGS: tuple[tuple[str, str, object, tuple | None, str], ...] = tuple(
    (d.flag, name, {"count": int, "number": float}.get(d.kind, str),
     d.choices if d.kind == "choice" else None, f"{d.help} [{default_text(name)}]")
    for name, d in DECLARED.items() if d.kind != "switch")


#: the command-line flag of each Settings field, for messages
_FLAG_OF: dict[str, str] = {name: d.flag for name, d in DECLARED.items()}


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="cohortlens",
        description="Explore and model longitudinal cohort data. "
                    "Exploratory research statistics, not for individual care decisions.")
    sub = parser.add_subparsers(dest="command")

    serve = sub.add_parser("serve", help="open the dashboard (default command)")
    serve.add_argument("data", nargs="?", help="CSV or Parquet file [bundled demo registry]")
    _add_roles(serve, required=False)
    serve.add_argument("--host", default="127.0.0.1", help="address to bind [127.0.0.1]")
    serve.add_argument("--port", type=int, default=8050, help="port [8050]")
    serve.add_argument("--debug", action="store_true", help="Dash debug mode (development only)")
    serve.add_argument("--verbose", action="store_true",
                       help="log every request the page makes [quiet]")
    serve.add_argument("--open", dest="open_browser", action="store_true",
                       help="open the dashboard in the default web browser [off]")
    serve.add_argument("--cache-mb", type=float, default=None, metavar="MB",
                       help="memory budget of uploaded tables plus cached results, half each; "
                            "least recently used dropped first [1024]")
    _add_settings(serve)
    _add_engine(serve)

    summ = _data_command(sub, "summarize", "write every exploratory number as JSON")
    summ.add_argument("--json", required=True, metavar="OUT", help="output file ('-' = stdout)")
    _add_engine(summ)

    fit = _data_command(sub, "fit", "fit and compare candidate covariance models, write JSON",
                        models=True)
    fit.add_argument("--json", required=True, metavar="OUT", help="output file ('-' = stdout)")
    _add_engine(fit)

    rep = _data_command(sub, "report", "write the exploration and the models as one HTML file",
                        models=True)
    rep.add_argument("--no-models", action="store_true", help="exploration only, fit no models")
    rep.add_argument("--out", required=True, metavar="FILE.html", help="report file to write")
    rep.add_argument("--plan", action="store_true",
                     help="add a plan of the next study (cohort defaults, or the plan flags)")
    _add_plan_options(rep)
    _add_engine(rep)

    plan = _data_command(sub, "plan", "plan the size of the next study from this cohort's "
                         "fitted covariance, write JSON", models=True)
    _add_plan_options(plan)
    plan.add_argument("--simulate", type=int, default=None, metavar="REPS",
                      help="check the power by simulating and refitting REPS cohorts")
    plan.add_argument("--json", required=True, metavar="OUT", help="output file ('-' = stdout)")

    part = sub.add_parser("partition", help="rewrite a table into subject-hash Parquet "
                          "partitions (for --engine dask)")
    part.add_argument("data", help="CSV or Parquet file, or 'demo' for the bundled registry")
    part.add_argument("--subject", required=True, help="subject id column")
    part.add_argument("--out", required=True, metavar="DIR", help="folder to write (empty)")
    part.add_argument("--parts", type=int, default=16, help="number of partitions [16]")
    return parser


def _add_engine(p: argparse.ArgumentParser) -> None:
    g = p.add_argument_group("engine")
    g.add_argument("--engine", default="memory", choices=("memory", "dask"),
                   help="memory: this process (default); dask: a partitioned Parquet dataset "
                        "on a Dask cluster (the 'dask' extra)")
    g.add_argument("--scheduler", default=None, metavar="ADDRESS",
                   help="Dask scheduler address, e.g. tcp://10.0.0.5:8786 [a local cluster "
                        "sized to this machine]")


def _add_plan_options(p: argparse.ArgumentParser) -> None:
    """Flags of the next-study plan (each defaults to what this cohort shows)."""
    g = p.add_argument_group("plan of the next study")
    g.add_argument("--model", default=None, metavar="NAME",
                   help="fitted model whose covariance the plan assumes [preferred]")
    g.add_argument("--effect", type=float, default=None,
                   help="effect to detect: time × x coefficient, or slope difference for two "
                        "groups [the model's estimate]")
    g.add_argument("--design", default="continuous", choices=("continuous", "two-groups"),
                   help="covariate like this cohort's, or two equal groups [continuous]")
    g.add_argument("--power", type=float, default=0.8, help="target power [0.8]")
    g.add_argument("--alpha", type=float, default=0.05, help="two-sided level [0.05]")
    g.add_argument("--schedule", default=None, metavar="T1,T2,...",
                   help="planned visit times since the origin [this cohort's typical schedule]")
    g.add_argument("--dropout-rate", type=float, default=None, metavar="R",
                   help="dropouts per subject per time unit [this cohort's rate]")


def _add_model_options(p: argparse.ArgumentParser) -> None:
    """The model flags, built from the declaration of the model choices."""
    from analysis.models.modelstage import CHOICE_FIELDS, ModelChoices

    defaults = ModelChoices().to_dict()
    for f in CHOICE_FIELDS.values():
        default = defaults[f.name]
        metavar = f.flag.lstrip("-").upper().replace("-", "_")
        if f.kind == "switch":
            p.add_argument(f.flag, dest=f.name, action="store_const", const=f.switch_value,
                           default=None, help=f.help)
        elif f.kind == "one":                             # None: the file's or the default
            p.add_argument(f.flag, dest=f.name, default=None, choices=f.values(),
                           help=f"{f.help} [{default}]")
        elif f.kind == "count":
            p.add_argument(f.flag, dest=f.name, type=int, default=default, metavar=metavar,
                           help=f.help)
        else:                                             # comma-separated list
            shown = f" [{','.join(default)}]" if default else ""
            p.add_argument(f.flag, dest=f.name, default=None, metavar=metavar,
                           help=f"{f.help}{shown}")


def _model_choices(args):
    """ModelChoices from the model flags over a ``--settings`` file's "models" (absent from both:
    the declared defaults)."""
    from analysis.models.modelstage import CHOICE_FIELDS, ModelChoices

    given = _file_models(args)                            # a --settings file's "models"
    for f in CHOICE_FIELDS.values():
        value = getattr(args, f.name, None)
        if value is None:
            continue
        given[f.name] = _split(value) if f.kind == "list" else value
    if not given.get("structures", True):
        given.pop("structures")                           # "--models ''" keeps the default set
    return ModelChoices(**given)


def _file_models(args) -> dict:
    """The model choices a ``--settings`` file carries (its "models" object), checked."""
    if not getattr(args, "settings", None):
        return {}
    from analysis.settings_file import read_settings_document

    try:
        text = Path(args.settings).read_text(encoding="utf-8")
    except OSError as exc:
        raise CohortError(f"--settings {args.settings}: cannot read JSON ({exc})") from None
    doc = read_settings_document(text, name=f"--settings {args.settings}")
    return doc.models.to_dict() if doc.models is not None else {}


def _data_command(sub, name: str, text: str, *, models: bool = False) -> argparse.ArgumentParser:
    """A subcommand reading DATA with the role and setting flags (and the model flags)."""
    p = sub.add_parser(name, help=text)
    p.add_argument("data", help="CSV or Parquet file, or 'demo' for the bundled registry")
    _add_roles(p, required=False)
    _add_settings(p)
    if models:
        _add_model_options(p)
    return p


def _add_roles(p: argparse.ArgumentParser, *, required: bool) -> None:
    g = p.add_argument_group("column roles")
    g.add_argument("--subject", required=required, help="subject id column")
    g.add_argument("--time", required=required, help="time column (numbers or dates)")
    g.add_argument("--response", required=required, help="response column")
    g.add_argument("--covariate", action="append", default=None,
                   help="baseline covariate column (repeat or comma-separate; first is primary)")
    g.add_argument("--event-date", help="per-subject event date (for --origin event-date)")
    g.add_argument("--followup-end", help="per-subject end of follow-up (date or time), to tell "
                                          "leaving early from the end of the data")
    g.add_argument("--response-unit", help="unit of the response, for labels (e.g. 'mg/dL')")
    g.add_argument("--covariate-unit", help="unit of the primary covariate, for labels")
    g.add_argument("--label", action="append", default=None, metavar="COL=TEXT",
                   help="display label of a column, used in titles, axes, tables and "
                        "statements instead of its name (repeat for more columns)")


def _add_settings(p: argparse.ArgumentParser) -> None:
    g = p.add_argument_group("settings")
    g.add_argument("--settings", metavar="FILE.json",
                   help="settings as JSON (a summarize output works too); flags override it")
    for flag, field, typ, choices, text in SETTING_FLAGS:
        g.add_argument(flag, dest=f"set_{field}", type=typ, choices=choices, default=None, help=text)
    for name, d in DECLARED.items():
        if d.kind == "switch":
            g.add_argument(d.flag, dest=f"set_{name}", action="store_true", default=None,
                           help=f"{d.help} [{default_text(name)}]")
            if d.off_flag:
                g.add_argument(d.off_flag, dest=f"set_{name}", action="store_false",
                               help=d.off_help)


def resolve(args: argparse.Namespace) -> tuple[object, Roles | None, Settings]:
    """Data source, roles and settings from the parsed arguments (flags over --settings file)."""
    base_settings: dict = {}
    base_roles: dict | None = None
    if getattr(args, "settings", None):
        try:
            loaded = json.loads(Path(args.settings).read_text(encoding="utf-8"))
        except (OSError, json.JSONDecodeError) as exc:
            raise CohortError(f"--settings {args.settings}: cannot read JSON ({exc})") from None
        if not isinstance(loaded, dict):
            raise SettingsError(f"--settings {args.settings}: expected a JSON object of "
                                f"setting: value pairs, found a {_json_kind(loaded)}",
                                field="settings")
        if "settings" in loaded:
            base_settings = loaded["settings"]
            base_roles = loaded.get("roles")
            if not isinstance(base_settings, dict):
                raise SettingsError(f"--settings {args.settings}: 'settings' must be a JSON "
                                    f"object, found a {_json_kind(base_settings)}",
                                    field="settings")
            if base_roles is not None and not isinstance(base_roles, dict):
                raise SettingsError(f"--settings {args.settings}: 'roles' must be a JSON object "
                                    f"of role: column pairs, found a {_json_kind(base_roles)}",
                                    field="roles")
            base_settings = dict(base_settings)
        else:
            base_settings = dict(loaded)

    data = getattr(args, "data", None)
    if data == "demo" or data is None and args.command == "serve":
        from analysis.preparation.demo import DEMO_CSV, demo_roles, demo_settings
        if data == "demo" or not any(getattr(args, k) for k in ("subject", "time", "response")):
            data = DEMO_CSV
            base_roles = base_roles or demo_roles().to_dict()
            base_settings = {**demo_settings().to_dict(), **base_settings}

    covariates = []
    for item in args.covariate or []:
        covariates.extend(c.strip() for c in item.split(",") if c.strip())
    given = {"subject": args.subject, "time": args.time, "response": args.response,
             "event_date": args.event_date, "followup_end": args.followup_end}
    units = {"response_unit": getattr(args, "response_unit", None),
             "covariate_unit": getattr(args, "covariate_unit", None)}
    roles = None
    if base_roles or any(v for v in given.values()) or covariates:
        merged = dict(base_roles or {})
        merged.update({k: v for k, v in given.items() if v})
        if covariates:
            merged["covariates"] = covariates
        merged.update({k: v for k, v in units.items() if v})
        if getattr(args, "label", None):
            merged["labels"] = {**(merged.get("labels") or {}), **_parse_labels(args.label)}
        missing = [k for k in ("subject", "time", "response") if not merged.get(k)]
        if missing:
            if args.command == "serve":
                merged = None
            else:
                raise CohortError("missing column role(s): " + ", ".join(
                    f"--{m}" for m in missing) + " (name the columns that hold them)")
        roles = Roles.from_dict(merged) if merged else None
    elif args.command != "serve":
        raise CohortError("name the column roles: --subject COL --time COL --response COL")

    settings_dict = dict(base_settings)
    for name in DECLARED:
        value = getattr(args, f"set_{name}")
        if value is not None:
            settings_dict[name] = value
    for name, d in DECLARED.items():
        if d.kind == "breaks" and isinstance(settings_dict.get(name), str):
            settings_dict[name] = _parse_breaks(settings_dict[name])
            for other, value in d.flag_sets.items():
                settings_dict.setdefault(other, value)
        if d.kind == "center" and isinstance(settings_dict.get(name), str):
            settings_dict[name] = _parse_center(settings_dict[name])
    return data, roles, Settings.from_dict(settings_dict)


def _json_kind(value) -> str:
    """How JSON calls a parsed value ('list', 'string', 'number' ...)."""
    if isinstance(value, bool):
        return "true/false value"
    return {list: "list", str: "string", int: "number", float: "number", dict: "object",
            type(None): "null"}.get(type(value), type(value).__name__)


def _check_output(out: str, flag: str) -> None:
    """Fail before any work when the output file cannot be written there."""
    if out == "-":
        return
    folder = Path(out).expanduser().resolve().parent
    if not folder.is_dir():
        raise CohortError(f"{flag} {out}: the folder {folder} does not exist; create it or "
                          "choose another path")
    if Path(out).is_dir():
        raise CohortError(f"{flag} {out}: is a folder; give a file name")


#: option flags whose value may start with '-' (a negative number), e.g. ``--breaks -50,1e6``
_VALUE_FLAGS = frozenset(f for f, *_ in SETTING_FLAGS)
_NEGATIVE = re.compile(r"^-(\d|\.\d|inf)", re.IGNORECASE)


def join_negative_values(argv: list[str]) -> list[str]:
    """``--breaks -50,1e6`` → ``--breaks=-50,1e6`` so argparse does not read the value as a flag."""
    out: list[str] = []
    i = 0
    while i < len(argv):
        a = argv[i]
        if a in _VALUE_FLAGS and i + 1 < len(argv) and _NEGATIVE.match(argv[i + 1]):
            out.append(f"{a}={argv[i + 1]}")
            i += 2
            continue
        out.append(a)
        i += 1
    return out


def _parse_breaks(text: str) -> tuple[float, ...]:
    try:
        return tuple(float(b) for b in text.split(",") if b.strip())
    except ValueError:
        raise SettingsError(f"--breaks {text!r}: expected numbers separated by commas, "
                            "e.g. 10,20,40", field="breaks") from None


def _parse_labels(items: list[str]) -> dict[str, str]:
    """``--label COL=TEXT`` flags as {column: label}."""
    out = {}
    for item in items:
        column, sep, text = item.partition("=")
        if not sep or not column.strip():
            raise SettingsError(f"--label {item!r}: write the column, '=' and its display "
                                "label, e.g. --label egfr=eGFR", field="roles")
        out[column.strip()] = text.strip()
    return out


def _parse_center(text: str):
    if text in opt.CENTER_WORDS:
        return text
    try:
        return float(text)
    except ValueError:
        raise SettingsError(f"--center {text!r}: expected none, mean, median or a number",
                            field="center") from None


def _write_json(payload: dict, out: str) -> None:
    text = json.dumps(payload, indent=2, allow_nan=False)
    if out == "-":
        sys.stdout.write(text + "\n")
    else:
        _check_output(out, "--json")
        try:
            Path(out).write_text(text + "\n", encoding="utf-8")
        except OSError as exc:
            raise CohortError(f"--json {out}: cannot write the file ({exc.strerror})") from None
        print(f"wrote {out}", file=sys.stderr)


def _load(data) -> "object":
    from analysis.preparation.loading import read_table

    return read_table(data)


def cmd_summarize(args) -> int:
    from analysis.pipeline import explore

    _check_output(args.json, "--json")
    data, roles, settings = resolve(args)
    if args.engine == "dask":
        from analysis.cluster.run import summarize_payload
        _write_json(summarize_payload(data, roles, settings, args.scheduler), args.json)
        return 0
    result = explore(_load(data), roles, settings)
    _write_json(result.to_json(), args.json)
    return 0


def cmd_fit(args) -> int:
    from analysis.jsonsafe import json_safe
    from analysis.models.modelstage import fit_models
    from analysis.preparation.prepare import prepare

    _check_output(args.json, "--json")
    choices = _model_choices(args)                       # checks every option before any work
    data, roles, settings = resolve(args)
    if args.engine == "dask":
        from analysis.cluster.run import fit_payload
        _write_json(fit_payload(data, roles, settings, choices, args.scheduler), args.json)
        return 0
    result = fit_models(prepare(_load(data), roles, settings), choices)
    payload = json_safe({"settings": settings.to_dict(), "roles": roles.to_dict(),
                         **result.to_json()})
    _write_json(payload, args.json)
    return 0


def cmd_report(args) -> int:
    from analysis.preparation.loading import Dataset
    from analysis.pipeline import Workbench
    from analysis.output.report import build_report
    from app.figures import report_figures, report_plan_figure

    _check_output(args.out, "--out")
    data, roles, settings = resolve(args)
    choices = None if args.no_models else _model_choices(args)
    name = "demo registry" if data == "demo" or str(data).endswith("kidney_registry.csv") \
        else Path(str(data)).name
    wants_plan = args.plan or any(getattr(args, k) is not None for k in (
        "model", "effect", "schedule", "dropout_rate"))
    if args.engine == "dask":
        from analysis.cluster.run import report_text
        if wants_plan:
            raise CohortError("--plan with --engine dask: not available yet; plan from a fit "
                              "in memory")
        from app.figures import aggregate_report_figures

        text = report_text(data, roles, settings, choices, args.scheduler,
                           figures=aggregate_report_figures)
        return _write_report(text, args.out)
    dataset = Dataset.from_frame(_load(data), name=name)
    wb = Workbench(max_entries=32, max_model_sets=1)
    exploration = wb.explore(dataset, roles, settings)
    models = wb.models(dataset, roles, settings, choices) if choices else None
    made = None
    if models is not None and wants_plan:
        made = _plan_for(args, wb, dataset, roles, settings, models)
    text = build_report(exploration.cohort, exploration, models, data_name=dataset.name,
                        data_key=dataset.key, choices=choices,
                        figures=report_figures(exploration, models),
                        plan=made, plan_figure=report_plan_figure(made) if made else None)
    return _write_report(text, args.out)


def _write_report(text: str, out: str) -> int:
    try:
        Path(out).write_text(text, encoding="utf-8")
    except OSError as exc:
        raise CohortError(f"--out {out}: cannot write the report ({exc.strerror})") from None
    print(f"wrote {out}", file=sys.stderr)
    return 0


#: most simulation replications the CLI runs (each refits one cohort)
MAX_SIMULATE = 5000


def _plan_for(args, wb, dataset, roles, settings, models):
    """The next-study plan from the plan flags, cohort defaults for the rest."""
    from analysis.models.plan_defaults import parse_schedule, plan_from_cohort

    return plan_from_cohort(
        wb.cohort(dataset, roles, settings), models,
        wb.summaries(dataset, roles, settings).dropout, model=args.model, effect=args.effect,
        schedule=parse_schedule(args.schedule), design=args.design, alpha=args.alpha,
        power=args.power, dropout_rate=args.dropout_rate)


def cmd_plan(args) -> int:
    from analysis.preparation.loading import Dataset
    from analysis.models.modelstage import ModelChoices
    from analysis.pipeline import Workbench
    from analysis.models.planning import simulate_power

    from analysis.models.plan_defaults import parse_schedule

    _check_output(args.json, "--json")
    parse_schedule(args.schedule)                       # a typo fails before any fitting
    if args.simulate is not None and not 1 <= args.simulate <= MAX_SIMULATE:
        raise SettingsError(f"--simulate {args.simulate}: must be from 1 to {MAX_SIMULATE} "
                            "replications")
    data, roles, settings = resolve(args)
    choices = ModelChoices.from_dict({**_model_choices(args).to_dict(), "gee": ()})
    dataset = Dataset.from_frame(_load(data), name=str(data))
    wb = Workbench(max_entries=32, max_model_sets=1)
    models = wb.models(dataset, roles, settings, choices)
    made = _plan_for(args, wb, dataset, roles, settings, models)
    check = (simulate_power(made.inputs, reps=args.simulate, seed=0)
             if args.simulate is not None else None)
    _write_json(made.to_json(check), args.json)
    return 0


def cmd_partition(args) -> int:
    from analysis.cluster.partitions import write_partitions

    data = args.data
    if data == "demo":
        from analysis.preparation.demo import DEMO_CSV
        data = DEMO_CSV
    written = write_partitions(_load(data), args.subject, args.out, n_parts=args.parts)
    print(f"wrote {len(written.files)} partitions to {written.folder} "
          f"({sum(written.rows):,} rows, {sum(written.subjects):,} subjects)", file=sys.stderr)
    return 0


def _split(text: str | None) -> tuple[str, ...]:
    return tuple(t.strip() for t in (text or "").split(",") if t.strip())


def cmd_serve(args) -> int:
    from app.server import run_server

    from app.datastore import DEFAULT_CACHE_MB

    cache_mb = DEFAULT_CACHE_MB if args.cache_mb is None else args.cache_mb
    if not 16 <= cache_mb <= 1_000_000:
        raise CohortError(f"--cache-mb {cache_mb:g}: must be from 16 to 1000000 (MB)")
    data, roles, settings = resolve(args)
    run_server(data_path=data, roles=roles, settings=settings, host=args.host, port=args.port,
               debug=args.debug, cache_mb=cache_mb, verbose=args.verbose,
               open_browser=args.open_browser, engine=args.engine, scheduler=args.scheduler)
    return 0


def main(argv: list[str] | None = None) -> int:
    argv = list(sys.argv[1:] if argv is None else argv)
    if not argv or (argv[0] not in COMMANDS and argv[0] not in ("-h", "--help")):
        argv.insert(0, "serve")
    parser = build_parser()
    args = parser.parse_args(join_negative_values(argv))
    handler = {"serve": cmd_serve, "summarize": cmd_summarize, "fit": cmd_fit,
               "report": cmd_report, "plan": cmd_plan, "partition": cmd_partition}[args.command]
    try:
        return handler(args)
    except CohortError as exc:
        flag = _FLAG_OF.get(getattr(exc, "field", None))
        hint = f" (flag {flag})" if flag and flag not in str(exc) else ""
        print(f"cohortlens: {exc}{hint}", file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        return 130


if __name__ == "__main__":
    sys.exit(main())
