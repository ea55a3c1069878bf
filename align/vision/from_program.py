"""The program source: a compiled PyTorch program (``vision.source = "program"``).

A ``.pt2`` file is a ``torch.export`` archive, read with ``torch.export.load``; any other file is
read as TorchScript with ``torch.jit.load``. Neither unpickles Python code: the archive holds a
serialised graph and tensors, TorchScript its own IR run by its own interpreter. A pickled module
(``torch.save(model)``) is refused rather than unpickled. The graph's output is pooled by
``vision.pooling``; the preprocessing comes from a sidecar JSON or the recipe (``declared.py``),
checked against the input shape an exported program fixes.
"""
from __future__ import annotations

import warnings
from pathlib import Path

import torch

from ..errors import AlignError
from ..recipe import VisionConfig
from .declared import PREPROCESSING_RULE, declared_preprocessing, eval_transform
from .identity import FILES_RULE, WEIGHTS_RULE, file_sha256, files_sha256, weights_sha256
from .pooling import PooledGraphTower, RULES, check_output_rank, pool_output

EXPORTED, TORCHSCRIPT = "torch.export program", "TorchScript module"


def _exported_input_side(program, path: Path) -> tuple[int, int] | None:
    """The (height, width) an exported program fixes for its one pixel input (None where symbolic)."""
    names = list(program.graph_signature.user_inputs)
    if len(names) != 1:
        raise AlignError(f"{path} takes {len(names)} inputs; an image tower takes one (B, 3, H, W) tensor",
                         "export the model with a single pixel input")
    node = next(n for n in program.graph.nodes if n.op == "placeholder" and n.name == names[0])
    shape = node.meta["val"].shape
    if len(shape) != 4:
        raise AlignError(f"{path} takes a rank-{len(shape)} input; an image tower takes (B, 3, H, W)")
    height, width = shape[2], shape[3]
    return (int(height), int(width)) if isinstance(height, int) and isinstance(width, int) else None


def load_program(path: Path) -> tuple[torch.nn.Module, str, tuple[int, int] | None]:
    """(callable module, kind, declared (height, width) or None), frozen."""
    if path.suffix == ".pt2":
        try:
            program = torch.export.load(str(path))
        except Exception as exc:  # noqa: BLE001 - any unreadable archive is the user's file
            raise AlignError(f"cannot read the torch.export archive {path}: {exc}",
                             "write it with torch.export.save(torch.export.export(model.eval(), (pixels,)), PATH)") from None
        side = _exported_input_side(program, path)
        # the graph was captured in eval mode; an exported module refuses .eval() and needs none
        return program.module().requires_grad_(False), EXPORTED, side
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", FutureWarning)  # torch marks TorchScript deprecated; it still loads
            module = torch.jit.load(str(path), map_location="cpu")
    except Exception as exc:  # noqa: BLE001 - not TorchScript: a pickle is never loaded as code
        raise AlignError(f"{path} is neither a torch.export archive (.pt2) nor TorchScript ({exc})",
                         "save the tower with torch.export.save (.pt2) or torch.jit.save; a pickled module is never "
                         "loaded, as unpickling it would run code") from None
    module.eval()
    for parameter in module.parameters():  # a ScriptModule has no requires_grad_(); its parameters do
        parameter.requires_grad_(False)
    return module, TORCHSCRIPT, None


class ProgramTower(PooledGraphTower):
    source = "program"

    def recipe_keys(self) -> dict:
        pre = self.preprocessing
        return {"source": "program", "model_path": self.weights_path, "pooling": self.pooling_choice,
                "image_size": self.input_side,
                "preprocess": {"mean": list(pre["mean"]), "std": list(pre["std"]),
                               "interpolation": pre["interpolation"], "crop_pct": pre["crop_pct"],
                               "crop_mode": pre["crop_mode"]}}

    def rebuild_record(self) -> dict:
        path = Path(self.weights_path)
        build = ("torch.export.load(file).module()" if self.name == EXPORTED
                 else "torch.jit.load(file, map_location='cpu').eval()")
        return {
            "library": f"torch {torch.__version__}",
            "build": build + "; call it on (B, 3, H, W) pixels",
            "weights": {"file": path.name, "path": str(path), "file_sha256": file_sha256(path)},
            "weights_sha256_rule": WEIGHTS_RULE + " (the loaded module's)",
            "files_sha256_rule": FILES_RULE,
            "preprocessing_rule": PREPROCESSING_RULE,
            "embedding_rule": f"{RULES[self.pooling_choice]}; divide each row by its L2 norm",
        }


def load_program_tower(cfg: VisionConfig) -> ProgramTower:
    path = Path(cfg.model_path).resolve()
    if not path.is_file():
        raise AlignError(f"no program file at {cfg.model_path}",
                         "set vision.model_path to a torch.export .pt2 or a TorchScript file")
    module, kind, side = load_program(path)
    preprocessing = declared_preprocessing(cfg, side)
    pooling = cfg.pooling or "output"
    with torch.inference_mode():
        probe = module(torch.zeros(1, *preprocessing["input_size"]))  # (1, ...) the output's shape
    check_output_rank(tuple(probe.shape), pooling, str(path))
    return ProgramTower(name=kind, model=module, transform=eval_transform(preprocessing), preprocessing=preprocessing,
                        weights_sha256=weights_sha256(module), weights_path=str(path),
                        feature_dim=int(pool_output(probe, pooling).shape[-1]), pooling=RULES[pooling],
                        files_sha256=files_sha256([path]), pooling_choice=pooling)
