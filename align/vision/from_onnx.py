"""The onnx source: an .onnx file run by onnxruntime (``vision.source = "onnx"``).

The graph takes one input, (B, 3, H, W) float pixels, and its first output is pooled by
``vision.pooling``. The file carries no preprocessing: it comes from a sidecar JSON or the recipe
(``declared.py``), checked against the input shape the graph declares. onnxruntime runs with its own
thread pool (intra-op threads = torch's thread count, one inter-op thread, sequential execution,
every graph optimisation): torch's thread settings do not reach it. The weights hash is that of the
files: the .onnx and any external-data files it names, so an edited graph is another tower.
"""
from __future__ import annotations

from pathlib import Path

import numpy as np
import torch

from ..errors import AlignError
from ..recipe import VisionConfig
from .declared import PREPROCESSING_RULE, declared_preprocessing, eval_transform
from .identity import FILES_RULE, file_sha256, files_sha256
from .pooling import PooledGraphTower, RULES, check_output_rank, pool_output

_NUMPY_TYPES = {"tensor(float)": np.float32, "tensor(float16)": np.float16, "tensor(double)": np.float64}


def model_files(path: Path) -> list[Path]:
    """The .onnx file, then the external-data files its initialisers name (in name order)."""
    import onnx
    from onnx.external_data_helper import uses_external_data

    model = onnx.load(str(path), load_external_data=False)
    names = {entry.value for tensor in model.graph.initializer if uses_external_data(tensor)
             for entry in tensor.external_data if entry.key == "location"}
    missing = [n for n in sorted(names) if not (path.parent / n).is_file()]
    if missing:
        raise AlignError(f"{path} keeps its weights in {missing[0]}, which is not beside it",
                         "copy the external-data file(s) next to the .onnx file")
    return [path] + [path.parent / n for n in sorted(names)]


class OnnxSession:
    """An onnxruntime session over the model file, called on pixel batches like a torch module."""

    def __init__(self, path: Path):
        import onnxruntime as ort

        self.path, self.files = path, model_files(path)
        options = ort.SessionOptions()
        options.intra_op_num_threads = max(1, torch.get_num_threads())
        options.inter_op_num_threads = 1
        options.execution_mode = ort.ExecutionMode.ORT_SEQUENTIAL
        options.graph_optimization_level = ort.GraphOptimizationLevel.ORT_ENABLE_ALL
        options.log_severity_level = 3  # errors only: the optimiser's notes are not the user's business
        try:
            self.session = ort.InferenceSession(str(path), options, providers=["CPUExecutionProvider"])
        except Exception as exc:  # noqa: BLE001 - onnxruntime raises its own types for any bad file
            raise AlignError(f"onnxruntime cannot load {path}: {exc}", "check it is a valid .onnx model") from None
        inputs = self.session.get_inputs()
        if len(inputs) != 1 or len(inputs[0].shape) != 4 or inputs[0].type not in _NUMPY_TYPES:
            shown = [(i.name, i.shape, i.type) for i in inputs]
            raise AlignError(f"{path} takes inputs {shown}; an image tower takes one (B, 3, H, W) float tensor",
                             "export the model with a single pixel input")
        self.input = inputs[0]
        self.output = self.session.get_outputs()[0].name
        batch = self.input.shape[0]
        self.fixed_batch = batch if isinstance(batch, int) and batch > 0 else None

    def declared_side(self) -> tuple[int, int] | None:
        height, width = self.input.shape[2:]
        return (height, width) if isinstance(height, int) and isinstance(width, int) else None

    def __call__(self, pixels: torch.Tensor) -> torch.Tensor:
        """(B, 3, H, W) -> the graph's first output for the batch, as a float32 tensor."""
        x = pixels.detach().contiguous().numpy().astype(_NUMPY_TYPES[self.input.type], copy=False)
        step = self.fixed_batch or len(x)
        parts = []
        for start in range(0, len(x), max(step, 1)):
            piece = x[start:start + step]
            short = step - len(piece)
            if short:  # a graph exported for a fixed batch: pad the last piece, keep only its real rows
                piece = np.concatenate([piece, np.zeros((short, *piece.shape[1:]), piece.dtype)])
            parts.append(self.session.run([self.output], {self.input.name: piece})[0][:step - short])
        return torch.from_numpy(np.concatenate(parts).astype(np.float32, copy=False))

    def weights_sha256(self) -> str:
        return files_sha256(self.files)

    def weight_bytes(self) -> int:
        return sum(f.stat().st_size for f in self.files)

    def activation_elements(self) -> int:
        """From the graph's inferred shapes at batch 1: the largest inputs + outputs of one node,
        initialisers left out. A dimension shape inference cannot fix counts as 1 (an estimate)."""
        import onnx

        model = onnx.shape_inference.infer_shapes(onnx.load(str(self.path), load_external_data=False))
        initialisers = {t.name for t in model.graph.initializer}
        sizes = {}
        for info in list(model.graph.input) + list(model.graph.value_info) + list(model.graph.output):
            dims = info.type.tensor_type.shape.dim
            sizes[info.name] = int(np.prod([d.dim_value if d.dim_value > 0 else 1 for d in dims])) if dims else 1
        worst = 0
        for node in model.graph.node:
            names = [n for n in list(node.input) + list(node.output) if n and n not in initialisers]
            worst = max(worst, sum(sizes.get(n, 0) for n in names))
        return worst


class OnnxTower(PooledGraphTower):
    source = "onnx"

    def activation_elements(self, side: int) -> int:
        return self.model.activation_elements()

    def recipe_keys(self) -> dict:
        pre = self.preprocessing
        return {"source": "onnx", "model_path": self.weights_path, "pooling": self.pooling_choice,
                "image_size": self.input_side, "preprocess": {"mean": list(pre["mean"]), "std": list(pre["std"]),
                               "interpolation": pre["interpolation"], "crop_pct": pre["crop_pct"],
                               "crop_mode": pre["crop_mode"]}}

    def rebuild_record(self) -> dict:
        import onnxruntime

        session = self.model
        return {
            "library": f"onnxruntime {onnxruntime.__version__}",
            "build": f"onnxruntime.InferenceSession(file); feed input {session.input.name!r} with (B, 3, H, W) "
                     f"pixels, read output {session.output!r}",
            "weights": {"file": session.path.name, "path": str(session.path), "file_sha256": file_sha256(session.path),
                        "external_data": [f.name for f in session.files[1:]]},
            "weights_sha256_rule": FILES_RULE + ", over the .onnx file then its external-data files in name order",
            "preprocessing_rule": PREPROCESSING_RULE,
            "embedding_rule": f"{RULES[self.pooling_choice]}; divide each row by its L2 norm",
        }


def load_onnx_tower(cfg: VisionConfig) -> OnnxTower:
    path = Path(cfg.model_path).resolve()
    if not path.is_file():
        raise AlignError(f"no ONNX model at {cfg.model_path}", "set vision.model_path to an existing .onnx file")
    session = OnnxSession(path)
    preprocessing = declared_preprocessing(cfg, session.declared_side())
    pooling = cfg.pooling or "output"
    side = preprocessing["input_size"][1:]
    probe = session(torch.zeros(1, 3, *side))  # (1, ...) the output's shape, before any image is read
    check_output_rank(tuple(probe.shape), pooling, str(path))
    digest = session.weights_sha256()
    return OnnxTower(name="onnx graph", model=session, transform=eval_transform(preprocessing),
                     preprocessing=preprocessing, weights_sha256=digest, weights_path=str(path),
                     feature_dim=int(pool_output(probe, pooling).shape[-1]), pooling=RULES[pooling],
                     files_sha256=digest, pooling_choice=pooling)
