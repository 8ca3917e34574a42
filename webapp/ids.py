"""Every component id of the web app, in one place (pages import these, never literals)."""

# shell
NAV = "nav"
URL = "url"

# editor page: inputs
UPLOAD = "upload"
UPLOAD_NOTE = "upload-note"
DEMO = "demo-pick"
ENERGY = "energy"
SUBSTRATE = "substrate"
REF_UPLOAD = "ref-upload"
REF_DEMO = "ref-demo"
REF_NOTE = "ref-note"
REF_ENERGY = "ref-energy"
REFERENCE = "reference-meta"
CALIBRATION = "calibration-pick"
RUN = "run"
CANCEL = "cancel"
PROGRESS = "progress"
PROGRESS_TEXT = "progress-text"
MESSAGE = "message"

# the pattern and its controls
GRAPH = "graph"
SCALE = "scale"
GAMMA = "gamma"
CLIP = "clip"
OVERLAYS = "overlays"
CLICK_MODE = "click-mode"
EDIT_SUMMARY = "edit-summary"
UNDO_EDITS = "undo-edits"

# the answer
RESULT_PANEL = "result-panel"
SPOT_COUNT = "spot-count"
WOOD = "wood"
MATRIX = "matrix"
CANDIDATES = "candidates"
CANDIDATE_PICK = "candidate-pick"
REAL_SPACE = "real-space"
MODEL_TEXT = "model-text"
MODEL_TRY = "model-try"
MODEL_NOTE = "model-note"

# saving and export
SAMPLE = "sample-name"
NOTES = "notes"
SAVE = "save"
SAVE_NOTE = "save-note"
SHARE_LINK = "share-link"
EXPORT_JSON = "export-json"
EXPORT_CSV = "export-csv"
EXPORT_PNG = "export-png"
EXPORT_SVG = "export-svg"
DOWNLOAD = "download"
COPY_TO_EDIT = "copy-to-edit"

# browser-side state
IMAGE = "image-meta"
PARAMS = "params"
EDITS = "edits"
RESULT = "result"
MODEL = "model"
SOURCE = "source-token"

# recent page
RECENT_LIST = "recent-list"
