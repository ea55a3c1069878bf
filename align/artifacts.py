"""File and folder names of everything align writes, in one place."""

# packed data (align pack)
MANIFEST = "manifest.json"
REJECTED = "rejected.jsonl"
SHARD_PATTERN = "{split}-{index:06d}.tar"
SPLITS = ("train", "val")

# run directory (align train / evaluate)
RESOLVED_RECIPE = "recipe.resolved.toml"
METRICS_LOG = "metrics.jsonl"
METRICS = "metrics.json"
CHECKPOINTS = "checkpoints"
CHECKPOINT_PREFIX = "step-"
TRAINABLE_WEIGHTS = "trainable.safetensors"
OPTIMIZER_STATE = "optimizer.pt"
SCHEDULER_STATE = "scheduler.pt"
TRAINER_STATE = "trainer_state.json"
RNG_STATE = "rng.pt"
TOKENIZER_DIR = "tokenizer"
NEW_TOKENS = "new_tokens.json"  # inside TOKENIZER_DIR: the domain terms added to the tokenizer
REPORT = "report.md"
LOSS_PLOT = "loss.png"

# feature cache
FEATURE_ROOT = "features"
FINGERPRINT = "fingerprint.json"
FEATURES = "features.f16"
FEATURE_KEYS = "keys.txt"
FEATURE_SKIPPED = "skipped.txt"  # keys whose image failed to decode
FEATURE_CHUNKS = "chunks"  # finished chunks of a build in progress (removed when it completes)
FEATURE_LOCK = ".lock"  # held while a process builds the entry

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
