"""Model registry: model type name (the ``model.type`` config field) → builder.

To add a model: write ``pipeline/models/<name>.py`` with a :class:`~pipeline.models.base.Model`
subclass and a ``from_config`` builder, declare its fields in ``pipeline.config.SCHEMA``
under ``"model:<name>"``, and add it to :data:`MODEL_TYPES` below (see DEVELOPERS.md).
"""

from __future__ import annotations

from importlib import import_module
from typing import Any

from pipeline.models.base import Model, RowBlock

__all__ = ["MODEL_TYPES", "Model", "RowBlock", "build_model"]

#: type name -> (module, class). Imported lazily so one model's dependencies never block another.
MODEL_TYPES: dict[str, tuple[str, str]] = {
    "lattice": ("pipeline.models.lattice", "LatticeWalk"),
    "exclusion": ("pipeline.models.exclusion", "ExclusionProcess"),
    "reactions": ("pipeline.models.reactions", "ReactionNetwork"),
    "network": ("pipeline.models.network", "GraphWalk"),
    "matrix": ("pipeline.models.matrix", "UserMatrix"),
}


def build_model(model_config: Any) -> Model:
    """Build the model that a validated ``config.model`` describes."""
    module_name, class_name = MODEL_TYPES[model_config.type]
    model_class = getattr(import_module(module_name), class_name)
    return model_class.from_config(model_config)
