"""The frozen image tower, from the format a team has it in.

    tower.py              FrozenImageTower: the one interface (preprocess, pooled, embed_pixels,
                          fingerprint, feature_dim, rebuild_record)
    identity.py           what makes two towers the same (tower_differences) and the hashes
    from_timm.py          an architecture name + a local weights file
    from_transformers.py  a local model folder with its image processor; pooling named in the recipe
    from_onnx.py          an .onnx file run by onnxruntime
    from_program.py       a torch.export .pt2 or TorchScript program (never an unpickled module)
    declared.py           the preprocessing an onnx or program file does not carry (sidecar / recipe)
    pooling.py            pooling a graph's raw output
    memory.py             refusing a tower pass larger than free memory
    loading.py            the recipe's tower, shared within a process
"""
from .from_timm import POOLING, default_vision_weights, load_timm_model, preprocessing_for
from .identity import NORMALISATION, TOWER_IDENTITY, tower_differences, weights_sha256
from .loading import load_image_tower, shared_image_tower, tower_files
from .memory import activation_bytes, check_fits_in_memory
from .tower import FrozenImageTower

__all__ = ["NORMALISATION", "POOLING", "TOWER_IDENTITY", "FrozenImageTower", "activation_bytes",
           "check_fits_in_memory", "default_vision_weights", "load_image_tower", "load_timm_model",
           "preprocessing_for", "shared_image_tower", "tower_differences", "tower_files", "weights_sha256"]
