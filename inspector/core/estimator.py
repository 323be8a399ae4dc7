"""Estimator manners shared by the camera conditions and the density models.

As scikit-learn keeps them (Buitinck et al. 2013, "API design for machine learning
software: experiences from the scikit-learn project", sec. 2): settings are the
constructor's keyword arguments, stored unchanged under the same names; everything learnt
is set by ``fit`` under a name ending in an underscore; a fitted-only method called before
``fit`` says so in one line.
"""

from __future__ import annotations

import inspect
from typing import Any


class NotFittedError(ValueError):
    """A method that needs learned state was called before ``fit``."""


class Estimator:
    """Base class: ``get_params``, ``__repr__`` and the fitted check, written once."""

    @classmethod
    def _param_names(cls) -> list[str]:
        sig = inspect.signature(cls.__init__)
        return [p.name for p in sig.parameters.values()
                if p.name != "self" and p.kind not in (p.VAR_POSITIONAL, p.VAR_KEYWORD)]

    def get_params(self) -> dict[str, Any]:
        """Constructor settings by name (``type(e)(**e.get_params())`` is an unfitted twin)."""
        return {k: getattr(self, k) for k in self._param_names()}

    def is_fitted(self) -> bool:
        """True once ``fit`` (or loading a saved one) has set learned state."""
        return any(k.endswith("_") and not k.startswith("_") for k in vars(self))

    def check_fitted(self) -> None:
        """Raise :class:`NotFittedError` unless fitted."""
        if not self.is_fitted():
            raise NotFittedError(f"this {type(self).__name__} is not fitted yet: call fit first")

    def __repr__(self) -> str:
        args = ", ".join(f"{k}={v!r}" for k, v in self.get_params().items())
        return f"{type(self).__name__}({args})"
