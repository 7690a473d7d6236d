"""Build and run the dashboard.

``create_app`` wires a fresh app around one bounded data store and one cached
:class:`~analysis.pipeline.Workbench`; nothing is loaded until the first page asks.
``run_server`` binds 127.0.0.1 unless told otherwise and never turns on Dash's
debug mode unless asked.
"""
from __future__ import annotations

import logging
from pathlib import Path

import dash
from dash import MATCH, Input, Output, State, no_update

from analysis.preparation.loading import Dataset, read_table
from analysis.pipeline import Workbench
from analysis.settings import Roles, Settings

from . import hub, ids
from . import presentation, travel
from .datastore import (DEFAULT_CACHE_MB, DEMO_KEY, MAX_REQUEST_BYTES, DataStore, demo_dataset,
                        upload_limit)
from .layout import build_layout
from .sections import SECTIONS
from .session import AppContext
from .text import renamed_note, shorten_columns

ASSETS = Path(__file__).resolve().parents[1] / "assets"
log = logging.getLogger("cohortlens.app")


def create_app(*, dataset: Dataset | None = None, roles: Roles | None = None,
               settings: Settings | None = None, workbench: Workbench | None = None,
               datastore: DataStore | None = None,
               max_request_bytes: int = MAX_REQUEST_BYTES,
               cache_mb: float = DEFAULT_CACHE_MB) -> dash.Dash:
    """A Dash app showing ``dataset`` (default: the invented demo registry) with these roles/settings.

    With no dataset the demo registry is used with its own roles and settings
    (loaded lazily on the first request). ``roles=None`` with a dataset makes the
    page ask for the column roles. ``max_request_bytes`` bounds one HTTP request; the page
    refuses files that would not fit (before sending them) and says so beside the upload.
    ``cache_mb`` is the memory budget of uploads and cached results together: half for the
    uploaded tables, half for the results (least recently used dropped first).
    """
    budget = int(cache_mb * 2**20)
    datastore = datastore or DataStore(max_bytes=max(1, budget // 2))
    if dataset is None:
        from analysis.preparation.demo import demo_roles, demo_settings

        key = datastore.pin(DEMO_KEY, demo_dataset)
        roles = roles or demo_roles()
        settings = settings or demo_settings()
    else:
        key = datastore.pin(dataset.key, dataset)
    context = AppContext(datasets=datastore, workbench=workbench or _memory_workbench(cache_mb),
                         default_key=key, default_roles=roles,
                         default_settings=settings or Settings())
    app = dash.Dash(__name__, title="cohortlens", assets_folder=str(ASSETS),
                    suppress_callback_exceptions=False, update_title=None)
    max_upload = upload_limit(max_request_bytes)
    app.layout = lambda: build_layout(context.default_settings, max_upload_bytes=max_upload)
    app.server.config["MAX_CONTENT_LENGTH"] = max_request_bytes
    hub.register(app, context)
    _register_page(app, context)
    for section in SECTIONS:
        section.register(app, context)
    presentation.register(app, context)
    travel.register(app, context)
    app._cohortlens = context  # for tests: the app's caches
    return app


def _register_page(app, context: AppContext) -> None:
    """Page-wide callbacks: the caution note and the SVG buttons."""
    # the settings store is written by the hub with the controls (app/hub.py)
    @app.callback(Output(ids.PAGE_CAUTION, "style"), Input(ids.PAGE_CAUTION_CLOSE, "n_clicks"),
                  prevent_initial_call=True)
    def hide_caution(n):
        return {"display": "none"} if n else no_update

    app.clientside_callback(
        """function(n, id) {
            if (!n) { return window.dash_clientside.no_update; }
            const el = document.querySelector('#' + CSS.escape(id.index) + ' .js-plotly-plot');
            if (el && window.Plotly) {
                window.Plotly.downloadImage(el, {format: 'svg', filename: id.index});
            }
            return 'Saved as SVG';
        }""",
        Output({"type": ids.EXPORT_SVG, "index": MATCH}, "title"),
        Input({"type": ids.EXPORT_SVG, "index": MATCH}, "n_clicks"),
        State({"type": ids.EXPORT_SVG, "index": MATCH}, "id"),
        prevent_initial_call=True,
    )


# ------------------------------------------------------------------ running
def request_logging(verbose: bool) -> None:
    """One log line per request only when ``verbose``; otherwise the server's request log
    (werkzeug) says warnings and errors only."""
    logging.basicConfig(level=logging.INFO, format="%(levelname)s %(name)s: %(message)s")
    logging.getLogger("werkzeug").setLevel(logging.INFO if verbose else logging.WARNING)


def open_browser_later(url: str, delay: float = 1.0):
    """Open ``url`` in the default browser once the server has had ``delay`` s to start."""
    import threading
    import webbrowser

    timer = threading.Timer(delay, webbrowser.open, args=(url,))
    timer.daemon = True
    timer.start()
    return timer


#: glibc mallopt parameter numbers (malloc.h)
M_ARENA_MAX = -8
M_MMAP_THRESHOLD = -3
#: allocations from this size on get memory of their own from the system, returned when freed
MMAP_THRESHOLD_BYTES = 4 * 2**20


def tune_allocator(arenas: int = 2, mmap_threshold: int = MMAP_THRESHOLD_BYTES) -> bool:
    """Keep the C allocator (glibc malloc) from holding memory the server no longer uses.

    The server answers each callback on its own thread; glibc gives busy threads memory pools
    (arenas) of their own, up to eight per core, and memory freed in one is not reused by
    another. It also raises the size from which a block is mapped on its own (and so returned
    to the system when freed) after every large free, so that later large arrays stay inside
    the pools. At 1 M rows both left the server holding a third more than its views used.
    ``arenas`` caps the pools; a fixed ``mmap_threshold`` keeps every array of that size or
    more (a 1 M-row column is 8 MB) mapped on its own. Returns whether glibc took both
    settings (False where there is no glibc ``mallopt``, e.g. macOS: nothing changes there).
    """
    import ctypes

    try:
        mallopt = ctypes.CDLL(None).mallopt
        return bool(mallopt(M_ARENA_MAX, int(arenas))) \
            and bool(mallopt(M_MMAP_THRESHOLD, int(mmap_threshold)))
    except (OSError, AttributeError):
        return False


def run_server(*, data_path=None, roles: Roles | None = None, settings: Settings | None = None,
               host: str = "127.0.0.1", port: int = 8050, debug: bool = False,
               cache_mb: float = DEFAULT_CACHE_MB, verbose: bool = False,
               open_browser: bool = False, engine: str = "memory",
               scheduler: str | None = None) -> None:
    """Serve the dashboard until interrupted (loopback only unless ``host`` says otherwise);
    quiet unless ``verbose``; ``open_browser`` opens the page in the default browser.
    ``engine="dask"``: ``data_path`` is a partitioned Parquet dataset analysed on the Dask
    cluster at ``scheduler`` (or a local one sized to this machine)."""
    from analysis.preparation.demo import DEMO_CSV

    request_logging(verbose)
    tune_allocator()                # before the warm-up and request threads start
    if engine == "dask":
        from analysis.cluster.run import page_workbench

        if not verbose:      # the scheduler's and workers' start-up lines only with --verbose
            try:
                import distributed  # noqa: F401 - sets its loggers' levels when imported
            except ImportError:     # open_client says how to install it
                pass
            logging.getLogger("distributed").setLevel(logging.WARNING)
        with page_workbench(data_path, roles, scheduler, memory=_memory_workbench(cache_mb),
                            max_bytes=_results_bytes(cache_mb)) as wb:
            app = create_app(dataset=wb.dataset, roles=roles, settings=settings, workbench=wb,
                             cache_mb=cache_mb)
            _serve(app, host, port, debug, open_browser)
        return
    if data_path is None or Path(data_path) == DEMO_CSV:
        app = create_app(roles=roles, settings=settings, cache_mb=cache_mb)
    else:
        frame, renamed = shorten_columns(read_table(data_path))
        if renamed:
            print(f"cohortlens: {renamed_note(renamed)}")
        app = create_app(dataset=Dataset.from_frame(frame, name=Path(data_path).name),
                         roles=roles, settings=settings, cache_mb=cache_mb)
    _serve(app, host, port, debug, open_browser)


def _results_bytes(cache_mb: float) -> int:
    """The cached results' half of ``cache_mb`` (the uploads get the other half)."""
    budget = int(cache_mb * 2**20)
    return max(1, budget - budget // 2)


def _memory_workbench(cache_mb: float) -> Workbench:
    """The in-memory Workbench with the results' half of ``cache_mb``."""
    return Workbench(max_entries=128, max_bytes=_results_bytes(cache_mb))


def _serve(app, host, port, debug, open_browser) -> None:
    _warm_up(app._cohortlens)
    if host not in ("127.0.0.1", "localhost", "::1"):
        print(f"cohortlens: WARNING binding {host}: other computers on the network can reach "
              "this dashboard and its data.")
    url = f"http://{'127.0.0.1' if host == '0.0.0.0' else host}:{port}/"
    print(f"cohortlens: open {url} "
          "(Ctrl+C stops it). Exploratory research statistics, not for individual care "
          "decisions.", flush=True)
    if open_browser:
        open_browser_later(url)
    app.run(host=host, port=port, debug=bool(debug))


def _warm_up(context: AppContext) -> None:
    """Prepare the start-up table's column list and default views in the background while the
    page is being opened (a large file then opens as soon as they are ready; a page that asks
    meanwhile waits for the same computation instead of starting its own)."""
    import threading

    def work():
        try:
            dataset = context.datasets.get(context.default_key)
            context.workbench.describe(dataset)
            if context.default_roles is not None:
                context.workbench.explore(dataset, context.default_roles,
                                          context.default_settings)
        except Exception:  # noqa: BLE001 - the page shows any problem beside its control
            log.debug("warm-up stopped", exc_info=True)

    threading.Thread(target=work, name="cohortlens-warm-up", daemon=True).start()
