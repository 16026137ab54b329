"""frostvane training: consensus labels, synthetic scenes, fitting, export, evaluation, effort.

The public API:

- :func:`train_model`, :class:`TrainConfig`, :func:`split_images`
- :func:`evaluate_model` (``frostvane evaluate``), :func:`score_catalogs`, :func:`match_objects`
- :func:`synthesize_tileset`, :func:`render_scene` (invented demo scenes)
- :func:`write_report`, :func:`headline_table`
- the ``frostvane`` console script: :func:`main`
"""

from .cli import main
from .evaluate import evaluate_model
from .report import headline_table, write_report
from .scoring import match_objects, score_catalogs
from .synth import render_scene, synthesize_tileset
from .train import TrainConfig, split_images, train_model

__all__ = [
    "TrainConfig",
    "evaluate_model",
    "headline_table",
    "main",
    "match_objects",
    "render_scene",
    "score_catalogs",
    "split_images",
    "synthesize_tileset",
    "train_model",
    "write_report",
]
