"""Text towers: the only side that learns.

    tokenizers.py  where a pretrained encoder lives; tokenizer mechanics (reading terms, adding
                   whole-word tokens, the scratch WordPiece trainer, the run's tokenizer folder)
    tower.py       TextTower: the one text head (tokenize, mean pooling, projection, L2 norm)
    kinds.py       lora / full / scratch, one object each; ``build_text_tower``
    precision.py   train.precision: "auto" -> bf16 where the device multiplies bf16 natively, else fp32
"""
from .kinds import KINDS, TextKind, build_text_tower, text_kind
from .tokenizers import default_text_model_dir, text_model_dir
from .tower import TextTower, mean_pool

__all__ = ["KINDS", "TextKind", "TextTower", "build_text_tower", "default_text_model_dir", "mean_pool",
           "text_kind", "text_model_dir"]
