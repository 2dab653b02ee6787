"""Every component id of the dashboard, in one place.

Panels import their ids from here, so a test (or another panel) can name a component without
repeating a string. Pattern-matching ids are built by the small functions at the end.
"""

from __future__ import annotations

# ---------------------------------------------------------------- state (dcc.Store)
DRAFT = "store-draft"              # the scenario being edited (editor document, JSON)
VALID = "store-valid"              # TOML text of the last valid scenario, with its name and digest
CHECK = "store-check"              # problems of the draft, located at their fields
RUNS = "store-runs"                # the runs of the session (names, scenario TOML, archive keys)
LOADED = "store-loaded"            # changes when a new scenario is opened (panels refresh their inputs)
PENDING = "store-pending"          # the 'from' compartment of a link being drawn by clicking
PAGE = "store-page"                # this page load: a random token (run job keys) and the upload limit
UPLOADED = "store-uploaded"        # a file the page accepted for upload (contents, name), see the scenario bar
EDITS = "store-edits"              # how many changes the page has made (counted in the page)
SAVED = "store-saved"              # what the server kept: {"n": edits saved, "revision", "conflict", "saved"}

# ---------------------------------------------------------------- header and scenario bar
CAUTION = "caution"
EXAMPLE = "example-pick"
OPEN_EXAMPLE = "example-open"
UPLOAD = "scenario-upload"
NEW = "scenario-new"
SAVE = "scenario-save"
SAVE_DOWNLOAD = "scenario-save-download"
SAVE_PROJECT = "project-save"
SCENARIO_NAME = "scenario-name"
FILE_NAME = "scenario-file"
OPEN_MESSAGE = "scenario-open-message"
SESSION_NOTE = "session-note"      # "kept in this browser's session, saved at ..."
SESSION_CONFLICT = "session-conflict"  # shown when another tab saved this browser's work since
KEEP_THIS = "session-keep-this"    # keep this page's version over the other tab's

# ---------------------------------------------------------------- undo and redo (header)
UNDO = "edit-undo"
REDO = "edit-redo"
HISTORY = "store-history"          # the drafts the page has had (kept in the page only)

# ---------------------------------------------------------------- network editor
CANVAS = "network-canvas"
ADD_COMPARTMENT = "network-add-compartment"
DELETE = "network-delete"
LINK_KIND = "network-link-kind"
LINK_FROM = "network-link-from"
LINK_TO = "network-link-to"
CONNECT = "network-connect"
CLICK_CONNECT = "network-click-connect"
TIDY = "network-tidy"
NETWORK_MESSAGE = "network-message"
DELETE_NOTE = "delete-note"        # what a delete took with it (with the way back)
LEGEND = "network-legend"

# ---------------------------------------------------------------- properties
SELECT = "element-select"          # which compartment or link is edited (value "c:<key>" / "l:<key>")
PROPERTIES = "properties-body"
LAYER_GRID = "layer-grid"
LAYER_ADD = "layer-add"
LAYER_REMOVE = "layer-remove"
LAYER_UP = "layer-up"
LAYER_DOWN = "layer-down"
LAYER_MESSAGES = "layer-messages"
STACK_FIGURE = "stack-figure"
STEADY_TABLE = "steady-table"
STEADY_FIGURE = "steady-figure"

# ---------------------------------------------------------------- doses
DOSE_GRID = "dose-grid"
DOSE_ADD = "dose-add"
DOSE_REMOVE = "dose-remove"
DOSE_MESSAGES = "dose-messages"
DOSE_TIMELINE = "dose-timeline"

# ---------------------------------------------------------------- run
DURATION = "run-duration"
OUTPUT_STEP = "run-output-step"
OUTPUT_TIMES_NOTE = "run-output-times-note"
RUN_NAME = "run-name"
RUN = "run-button"
RUN_LAST = "run-last-valid"        # run the last valid version instead (shown while the screen has problems)
RUN_REQUEST = "store-run-request"  # which run was asked for, with a nonce (see the run panel)
CANCEL = "run-cancel"
PROGRESS = "run-progress"
PROGRESS_TEXT = "run-progress-text"
RUN_STATUS = "run-status"
PROBLEMS = "run-problems"
RUN_PICK = "runs-pick"             # which runs are shown (and compared)
REFERENCE = "runs-reference"
RUNS_CLEAR = "runs-clear"
OPEN_RUN = "runs-open"

# ---------------------------------------------------------------- results
RESULT_TABS = "result-tabs"
CONC_FIGURE = "fig-concentration"
CONC_SCALE = "conc-scale"
CONC_UNIT = "conc-unit"            # the concentration unit of every plot and of the metrics table
AMOUNT_UNIT = "amount-unit"        # the amount unit of every plot and of the metrics table
CONC_SPLIT = "conc-split"          # one panel per side of the network, or one plot
CONC_QUANTITY = "conc-quantity"
COMPARTMENT_PICK = "compartment-pick"
TIME_UNIT = "time-unit"
BARRIER_PICK = "barrier-pick"
FLUX_FIGURE = "fig-flux"
PERMEATED_FIGURE = "fig-permeated"
PROFILE_BARRIER = "profile-barrier"
PROFILE_SLIDER = "profile-slider"
PROFILE_TIME = "profile-time"
PROFILE_FIGURE = "fig-profile"
PROFILE_PLAY = "profile-play"
PROFILE_TICK = "profile-tick"
PROFILE_STEADY = "profile-steady"
BALANCE_FIGURE = "fig-balance"
METRICS_GRID = "metrics-grid"
METRICS_FILTER = "metrics-filter"
COMPARE_GRID = "compare-grid"
WARNINGS = "run-warnings"
EXPORT_RUN = "export-run"
EXPORT_CSV = "export-csv"
EXPORT_METRICS = "export-metrics"
EXPORT_COMPARISON = "export-comparison"
EXPORT_SIDECAR = "export-sidecar"
EXPORT_DOWNLOAD = "export-download"
IMAGE_FORMAT = "image-format"
MEASURED = "store-measured"        # measured data shown over the plots: {"name", "text"} of the data file
MEASURED_UPLOAD = "measured-upload"
MEASURED_CLEAR = "measured-clear"
MEASURED_NOTE = "measured-note"


# ---------------------------------------------------------------- fit to data
FIT_DATA = "store-fit-data"        # the lab's data file: {"name", "text"}
FIT_PREVIEW = "store-fit-preview"  # the open scenario's curves over the span of the data
FIT_RESULT = "store-fit-result"    # the last fit, packed (dashboard.fitting.pack_fit)
FIT_UPLOAD = "fit-upload"
FIT_EXAMPLE = "fit-example-pick"
FIT_OPEN_EXAMPLE = "fit-example-open"
FIT_DATA_NOTE = "fit-data-note"
FIT_OBSERVABLE = "fit-observable"
FIT_FREE = "fit-free"
FIT_BOUNDS = "fit-bounds"
FIT_WEIGHTS = "fit-weights"
FIT_OPTIONS = "fit-options"        # profile intervals, replicates one by one
FIT_MCMC = "fit-mcmc"
FIT_RUN = "fit-run"
FIT_CANCEL = "fit-cancel"
FIT_PROGRESS = "fit-progress"
FIT_STATUS = "fit-status"
FIT_FIGURE = "fig-fit"
FIT_RESIDUALS = "fig-fit-residuals"
FIT_TABLE = "fit-table"
FIT_WARNINGS = "fit-warnings"
FIT_ADOPT = "fit-adopt"
FIT_ADOPT_NOTE = "fit-adopt-note"
FIT_EXPORT_REPORT = "fit-export-report"
FIT_EXPORT_TOML = "fit-export-toml"
FIT_EXPORT_RESIDUALS = "fit-export-residuals"
FIT_DOWNLOAD = "fit-download"

# ---------------------------------------------------------------- variability (populations)
VARY_PATH = "vary-path"            # the parameter to give a spread (a parameter path)
VARY_DIST = "vary-distribution"
VARY_SPREAD = "vary-spread"
VARY_HINT = "vary-spread-hint"
VARY_ADD = "vary-add"
VARY_REMOVE = "vary-remove"        # type of the pattern-matching remove buttons {"type", "index"}
VARY_MESSAGE = "vary-message"
VARY_LIST = "vary-list"
VARY_STORE = "store-vary"          # the spreads, as --vary texts (PATH=SPEC)
VARY_N = "vary-subjects"
VARY_SEED = "vary-seed"
VARY_RUN = "vary-run"
VARY_CANCEL = "vary-cancel"
VARY_PROGRESS = "vary-progress"
VARY_PROGRESS_TEXT = "vary-progress-text"
VARY_STATUS = "vary-status"
VARY_RESULT = "store-vary-result"  # the archive key of the last population and its trace and metric names
VARY_TRACE = "vary-trace"
VARY_LOG = "vary-log"
VARY_BANDS = "fig-vary-bands"
VARY_METRIC = "vary-metric"
VARY_HISTOGRAM = "fig-vary-histogram"
VARY_RANKING = "fig-vary-ranking"
SWEEP_RUN = "sweep-run"
SWEEP_CANCEL = "sweep-cancel"
SWEEP_PROGRESS = "sweep-progress"
SWEEP_STATUS = "sweep-status"
SWEEP_RESULT = "store-sweep-result"  # the archive key of the last sweep and its metric names
SWEEP_METRIC = "sweep-metric"
SWEEP_FIGURE = "fig-sweep"


# ---------------------------------------------------------------- pattern-matching ids
def field(scope: str, name: str) -> dict[str, str]:
    """Id of an input of the properties panel: ``scope`` is ``"compartment"`` or ``"link"``."""
    return {"type": "field", "scope": scope, "name": name}


def field_message(scope: str, name: str) -> dict[str, str]:
    """Id of the message shown under the input :func:`field` ``(scope, name)``."""
    return {"type": "field-message", "scope": scope, "name": name}


def sweep_field(name: str, axis: int) -> str:
    """Id of an input of the sweep's axis 1 or 2: ``path``, ``range``, ``steps``, ``log``."""
    return f"sweep-{name}-{axis}"


def scenario_message(name: str) -> dict[str, str]:
    """Id of the message shown under a scenario-wide input (``duration``, ``output_step``, ``name``)."""
    return {"type": "field-message", "scope": "scenario", "name": name}
