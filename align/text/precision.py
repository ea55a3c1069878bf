"""The number format of the text step: bf16 where the device multiplies bf16 matrices natively, else fp32.

``train.precision = "auto"`` resolves here, once per run, to a concrete "bf16" or "fp32"; the run
folder and every checkpoint record the concrete value, never "auto" (the same recipe file means
different numbers on different machines, so the record must say which). bf16 means autocast around
the encoder's forward only: matrix products and their gradients run in bf16, while the master
weights, their gradients, AdamW's moments and the loss (its log-sum-exp over the global batch)
stay fp32 (the step casts the encoder's output back to fp32 and computes the loss outside autocast).

Native support, not mere availability: CPU autocast accepts bf16 everywhere, but without bf16
dot-product instructions (x86 ``avx512_bf16`` or AMX tiles; on Arm the BF16 extension oneDNN asks
for) every product is emulated by conversions and runs slower than fp32. On CUDA the device must
report bf16 support (compute capability 8.0 and newer).
"""
from __future__ import annotations

import platform

import torch

PRECISIONS = ("auto", "fp32", "bf16")


def cpu_has_bf16_matmul() -> bool:
    """True where this CPU has bf16 dot-product instructions (x86: avx512_bf16 or AMX; Arm: BF16)."""
    try:
        if platform.machine().lower() in ("x86_64", "amd64", "i686", "x86"):
            return bool(torch.cpu._is_avx512_bf16_supported() or torch.cpu._is_amx_tile_supported())
        return bool(torch.ops.mkldnn._is_mkldnn_bf16_supported())  # aarch64: oneDNN checks the BF16 extension
    except (AttributeError, RuntimeError):  # a torch build without these probes: assume none
        return False


def bf16_matmul_supported(device: torch.device | str) -> bool:
    """Whether ``device`` multiplies bf16 matrices natively."""
    device = torch.device(device)
    if device.type == "cuda":
        return torch.cuda.is_available() and torch.cuda.is_bf16_supported(including_emulation=False)
    if device.type == "cpu":
        return cpu_has_bf16_matmul()
    return False


def resolve_precision(requested: str, device: torch.device | str) -> str:
    """``requested`` ("auto", "fp32" or "bf16") as the concrete precision the step runs in on ``device``."""
    if requested not in PRECISIONS:
        raise ValueError(f"precision must be one of {', '.join(PRECISIONS)}, got {requested!r}")
    if requested != "auto":
        return requested
    return "bf16" if bf16_matmul_supported(device) else "fp32"


def text_autocast(precision: str, device: torch.device | str) -> torch.autocast:
    """The autocast context the encoder's forward runs in for a concrete ``precision``."""
    if precision not in ("fp32", "bf16"):
        raise ValueError(f"resolve the precision first (resolve_precision), got {precision!r}")
    device = torch.device(device)
    return torch.autocast(device_type=device.type, dtype=torch.bfloat16, enabled=precision == "bf16")
