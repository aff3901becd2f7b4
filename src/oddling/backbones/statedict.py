"""Read a weight file as a plain state dict and load it into a network with every key and shape
checked, so that a file which is not the architecture's is refused with a message that says why.

Only tensors are read: `torch.load(..., weights_only=True)` or safetensors, never arbitrary pickles.
"""
from __future__ import annotations

from pathlib import Path

import torch
from torch import nn

from oddling.errors import OddlingError

SHOWN = 3   # keys named in a message; the rest are counted


def read_state_dict(path: Path) -> dict[str, torch.Tensor]:
    """The tensors of a .safetensors file or a torch file (a state dict, or {"state_dict": ...})."""
    path = Path(path)
    try:
        if path.suffix == ".safetensors":
            from safetensors.torch import load_file

            state = load_file(str(path))
        else:
            state = torch.load(path, map_location="cpu", weights_only=True)
    except Exception as exc:   # pickle, zip and safetensors errors all mean the same: not a weight file
        text = str(exc).strip().splitlines()[0] if str(exc).strip() else ""
        reason = type(exc).__name__ + (f": {text[:200]}" if len(text) > 8 else "")
        raise OddlingError(f"{path} is not a readable PyTorch weight file ({reason})") from None
    if isinstance(state, dict) and isinstance(state.get("state_dict"), dict):
        state = state["state_dict"]
    if not isinstance(state, dict) or not state or not all(
            isinstance(k, str) and isinstance(v, torch.Tensor) for k, v in state.items()):
        raise OddlingError(f"{path} does not hold a state dict (a mapping of parameter names to tensors)")
    return {k.removeprefix("module."): v for k, v in state.items()}


def _names(keys: list[str]) -> str:
    shown = ", ".join(keys[:SHOWN])
    return shown + (f" and {len(keys) - SHOWN} more" if len(keys) > SHOWN else "")


def mismatches(module: nn.Module, state: dict[str, torch.Tensor]) -> list[str]:
    """What keeps `state` from loading strictly into `module`: missing keys, unexpected keys, wrong shapes."""
    expected = module.state_dict()
    missing = [k for k in expected if k not in state]
    unexpected = [k for k in state if k not in expected]
    shapes = [f"{k} (file {list(state[k].shape)}, network {list(v.shape)})"
              for k, v in expected.items() if k in state and tuple(state[k].shape) != tuple(v.shape)]
    problems = []
    if missing:
        problems.append(f"{len(missing)} missing keys: {_names(missing)}")
    if unexpected:
        problems.append(f"{len(unexpected)} unexpected keys: {_names(unexpected)}")
    if shapes:
        problems.append(f"{len(shapes)} wrong shapes: {_names(shapes)}")
    return problems


def load_strict(module: nn.Module, path: Path, what: str, state: dict | None = None,
                assign: bool = False) -> nn.Module:
    """Load the file at `path` into `module` with every key and shape checked; OddlingError naming
    `what` (e.g. "backbone 'resnet18' (torchvision resnet18)") if anything differs. `assign`: the
    file's tensors replace the module's (for a module built on the meta device)."""
    state = read_state_dict(path) if state is None else state
    problems = mismatches(module, state)
    if problems:
        raise OddlingError(f"weight file {path} does not fit {what}: " + "; ".join(problems))
    try:
        module.load_state_dict(state, strict=True, assign=assign)
    except RuntimeError as exc:   # dtype or other trouble the key/shape check did not catch
        raise OddlingError(f"weight file {path} does not fit {what}: {str(exc).splitlines()[0]}") from None
    return module
