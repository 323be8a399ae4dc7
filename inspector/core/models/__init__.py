"""Density models of a camera's normal appearance. Each lives in its own module.

Every model follows :class:`inspector.core.models.base.DensityModel`; the rest of the tool
(calibration, scoring, the store, the shells) only talks to that interface.
"""

from __future__ import annotations

from importlib import import_module

from inspector.errors import UsageError

#: Model name -> (module, class). Modules are imported only when used (torch is optional).
_REGISTRY = {
    "ppca": ("inspector.core.models.ppca", "PatchPPCA"),
    "vae": ("inspector.core.models.vae", "FrameVAEModel"),
}
MODEL_NAMES = tuple(_REGISTRY)


def model_class(name: str):
    """The model class registered as ``name``.

    Raises
    ------
    UsageError
        Unknown name, or the model needs a package that is not installed.
    """
    if name not in _REGISTRY:
        raise UsageError(f"unknown model {name!r}: choose one of {', '.join(MODEL_NAMES)}")
    module, cls = _REGISTRY[name]
    try:
        return getattr(import_module(module), cls)
    except ModuleNotFoundError as exc:
        if exc.name == "torch":
            raise UsageError(f"model {name!r} needs PyTorch: pip install torch==2.13.0") from None
        raise
