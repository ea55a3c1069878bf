"""Refusing, before any image is decoded, a tower pass that would run the machine out of memory."""
from __future__ import annotations

import torch

from ..errors import AlignError


def peak_op_elements(forward, model, side: int) -> int:
    """Run one image at ``side`` px through ``forward`` and record, for every operator, its inputs
    plus its output (alive together while it runs), weights left out; the largest such sum.

    Counted at the operator level so it works the same for an eager module, an exported program
    and a TorchScript module."""
    from torch.utils._python_dispatch import TorchDispatchMode
    from torch.utils._pytree import tree_leaves

    weights = set()
    if isinstance(model, torch.nn.Module) or hasattr(model, "state_dict"):
        weights = {t.data_ptr() for t in model.state_dict().values() if isinstance(t, torch.Tensor)}

    worst = [0]

    class _Peak(TorchDispatchMode):
        def __torch_dispatch__(self, func, types, args=(), kwargs=None):
            out = func(*args, **(kwargs or {}))
            alive = [t for t in tree_leaves((args, kwargs, out)) if isinstance(t, torch.Tensor)]
            worst[0] = max(worst[0], sum(t.numel() for t in alive if t.data_ptr() not in weights))
            return out

    with torch.inference_mode(), _Peak():
        forward(torch.zeros(1, 3, side, side))
    return worst[0]


def weight_bytes(model) -> int:
    if isinstance(model, torch.nn.Module) or hasattr(model, "state_dict"):
        return sum(t.numel() * t.element_size() for t in model.state_dict().values() if isinstance(t, torch.Tensor))
    return int(model.weight_bytes())  # an onnxruntime session: its initialisers


def activation_bytes(tower, batch_size: int) -> int:
    """Estimated peak memory of one forward pass over ``batch_size`` images at the tower's input size.

    One image runs through the model at the tower's probe side (small for a convolutional tower,
    the fixed side where the input shape is fixed) while the worst step is recorded; that scales
    with the pixel count and the batch. Weights come on top. An estimate, on the safe side for a
    plain feed-forward CNN or ViT; it exists to refuse a size that cannot fit, not to plan to the
    last megabyte.
    """
    probe = tower.probe_side()
    per_image = tower.activation_elements(probe) * 4 * (tower.input_side / probe) ** 2  # float32
    return int(per_image * batch_size + weight_bytes(tower.model))


def check_fits_in_memory(tower, batch_size: int) -> None:
    """Refuse, before any image is decoded, a tower pass that would run the machine out of memory."""
    import psutil

    need, free = activation_bytes(tower, batch_size), psutil.virtual_memory().available
    if need > 0.8 * free:
        raise AlignError(f"the image tower at {tower.input_side} px needs about {need / 2**30:.1f} GiB per batch of "
                         f"{batch_size} images; this machine has {free / 2**30:.1f} GiB free",
                         "lower vision.image_size (0 = the tower's native size) or vision.batch_size")
