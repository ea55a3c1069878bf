"""File and folder names of everything align writes, in one place."""

# packed data (align pack)
MANIFEST = "manifest.json"
REJECTED = "rejected.jsonl"
FAILED_PACK_REJECTED = "rejected-of-failed-pack.jsonl"  # a pack that packed nothing reports here, beside the old pack
PACK_STAGING = ".pack.partial"  # a pack in progress; moved into place only when it succeeds
PACK_PROGRESS = "progress.json"  # inside PACK_STAGING: what the finished shards cover (for a resumed pack)
PACK_RECORDS = "content-records.txt"  # inside PACK_STAGING: the content hash's lines so far, per split
PACK_SORT_RUNS = "sorting"  # inside PACK_STAGING: the listing's sorted runs (a large source only)
PACK_OPEN_SHARD = "{name}.partial"  # inside PACK_STAGING: a shard still being written
SHARD_PATTERN = "{split}-{index:06d}.tar"
SPLITS = ("train", "val")

# run directory (align train / evaluate)
RESOLVED_RECIPE = "recipe.resolved.toml"
METRICS_LOG = "metrics.jsonl"
METRICS = "metrics.json"
CHECKPOINTS = "checkpoints"
CHECKPOINT_PREFIX = "step-"
TRAINABLE_WEIGHTS = "trainable.safetensors"
OPTIMIZER_STATE = "adamw_moments.pt"  # AdamW's step counts and first/second moments
SCHEDULER_STATE = "lr_schedule.pt"  # the learning-rate schedule's position
PROGRESS = "progress.json"  # step, elapsed seconds, the image tower trained against; written last
RNG_STATE = "random_streams.pt"  # torch, numpy and Python RNG states
RESUMES_LOG = "resumes.jsonl"  # one line per resume that changed a free recipe field
TOKENIZER_DIR = "tokenizer"
NEW_TOKENS = "new_tokens.json"  # inside TOKENIZER_DIR: the domain terms added to the tokenizer
EVALUATION_DETAILS = "evaluation.json"  # per evaluation set: intervals, confusion matrices, gallery (for the report)
REPORT = "report.html"  # self-contained: styles and plots inline
PLOTS = "plots"  # the report's plots as PNG files
PLOT_TRAINING = "training.png"  # loss, temperature and learning rate against step
PLOT_VALIDATION = "validation.png"  # validation recall against step
PLOT_RECALL = "recall.png"  # recall@K both ways with 95% intervals
PLOT_FIELDS = "zero-shot.png"  # zero-shot beside the linear probe, per label field
PLOT_CONFUSION = "confusion-{field}.png"  # one per label field

# runs side by side (align compare)
COMPARE_TABLE = "compare.md"
COMPARE_JSON = "compare.json"
COMPARE_PLOT = "compare.png"

# feature cache
FEATURE_ROOT = "features"
FINGERPRINT = "fingerprint.json"
FEATURES = "features.f16"
FEATURE_KEYS = "keys.txt"
FEATURE_SKIPPED = "skipped.txt"  # keys whose image failed to decode
FEATURE_CHUNKS = "chunks"  # finished chunks of a build in progress (removed when it completes)
FEATURE_LOCK = ".lock"  # held while a process builds the entry

# training tables (beside the feature cache: <cache root>/tables/<split>-<digest>/), memory-mapped by every rank
TABLES = "tables"
TABLE_INFO = "table.json"  # what the table was built from and its row count; written last
TABLE_CAPTIONS = "captions.utf8"  # every caption's UTF-8 bytes, one after another
TABLE_OFFSETS = "caption_offsets.i64"  # (N + 1,) int64: caption i is bytes offsets[i]:offsets[i + 1]
TABLE_CAPTION_IDS = "caption_ids.i64"  # (N,) int64: equal id = the same caption text
TABLE_LABEL_IDS = "label_ids.i64"  # (N,) int64: equal id = the same labels; -1 = none
TABLE_FEATURE_ROWS = "feature_rows.i64"  # (N,) int64: the feature entry's row of training row i

# export (align export)
EXPORT_INFO = "export.json"
EXPORT_ADAPTER = "adapter"
EXPORT_TEXT_ENCODER = "text_encoder"
EXPORT_ONNX = "text_encoder.onnx"
IMAGE_SIDE = "image_side.json"
CARD_JSON = "card.json"
CARD_MD = "CARD.md"
PROJECTION = "projection.safetensors"
TEXT_HEAD = "head.json"
TEXT_HEAD_README = "README.md"

# gallery index (align index / query)
INDEX_INFO = "index.json"
INDEX_EMBEDDINGS = "embeddings.npy"
INDEX_KEYS = "keys.txt"
INDEX_PARQUET = "gallery.parquet"  # key, vector, caption and label columns, for vector databases
INDEX_ANN = "approximate.faiss"  # the on-disk approximate index (faiss IVF, 8-bit codes)
INDEX_LABELS = "labels.json"  # label fields and their distinct values, for filtered search
INDEX_LABEL_CODES = "label_codes.npy"  # (N, F) int32: row i's value of each field, -1 when it has none

# service home (align serve --home DIR)
SERVICE_DB = "jobs.db"
SERVICE_TOKEN = "token"  # mode 0600, made at first start
SERVICE_SETTINGS = "service.json"  # the settings the running service started with (workers read them)
SERVICE_LOCK = "service.lock"  # held by the one service using the home
SERVICE_RUNS = "runs"  # one run folder per job: runs/job-000001
SERVICE_EXPORTS = "exports"  # exports/<name>: what /exports/<name>/embed answers with
SERVICE_INDEXES = "indexes"  # indexes/<name>: the gallery index /exports/<name>/search answers from
SERVICE_RECIPES = "recipes"  # recipe files a job may name
SERVICE_DATA = "data"  # the default data root
SERVICE_FEATURES = "features"  # the frozen-feature cache of every job
SERVICE_LOGS = "logs"
SERVICE_LOCKS = "locks"  # one lock file per live worker process
SERVICE_LAUNCH = "launch"  # a launched job's recipe file and stop request: launch/job-000001.toml, .stop
JOB_DIR_PATTERN = "job-{id:06d}"
JOB_LOG = "job.log"  # inside a job's run folder: the console output of its attempts
