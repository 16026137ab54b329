"""frostvane training: consensus labels, synthetic scenes, fitting, export, evaluation, effort.

The public API:

- :func:`train_model`, :class:`TrainConfig`, :func:`split_images`
- :func:`evaluate_model` (``frostvane evaluate``), :func:`score_catalogs`, :func:`match_objects`
- :func:`synthesize_tileset`, :func:`render_scene` (invented demo scenes)
- :func:`write_report`, :func:`headline_table`
- :func:`analyse_winds`, :func:`write_winds`, :class:`WindSettings` (``frostvane winds``): surface winds by
  region and season from fan catalogs
- :func:`error_breakdown`, :func:`plot_error_tiles`, :func:`diagnose_catalogs`: where features are lost and
  where false detections come from
- :class:`Campaign`, :func:`read_campaign`, :func:`route_tiles`, :func:`estimate_effort`, :func:`run_effort`:
  routes with measured promises and the volunteer effort left; :func:`backtest` replays it on a hidden catalog
- :func:`rank_tiles`, :func:`labelling_order_study`: where the next volunteer hour goes; :func:`learning_curve`
"""

import importlib

# Submodules load on first use, so that the command line does not import the
# training stack (scikit-learn, ONNX export) to screen or estimate effort.
_LAZY = {
    "analyse_winds": "winds.winds",
    "write_winds": "winds.winds",
    "WindSettings": "winds.winds",
    "Campaign": "effort.campaign",
    "read_campaign": "effort.campaign",
    "route_tiles": "effort.routing",
    "estimate_effort": "effort.estimate",
    "run_effort": "effort.effort",
    "backtest": "effort.backtest",
    "rank_tiles": "effort.active",
    "labelling_order_study": "effort.active",
    "learning_curve": "effort.curve",
    "diagnose_catalogs": "evaluation.diagnose",
    "error_breakdown": "evaluation.diagnose",
    "evaluate_model": "evaluation.evaluate",
    "headline_table": "evaluation.report",
    "write_report": "evaluation.report",
    "match_objects": "evaluation.matching",
    "plot_error_tiles": "evaluation.diagnose",
    "score_catalogs": "evaluation.scoring",
    "render_scene": "synth",
    "synthesize_tileset": "synth",
    "TrainConfig": "fitting.train",
    "split_images": "fitting.train",
    "train_model": "fitting.train",
}


def __getattr__(name):
    if name in _LAZY:
        return getattr(importlib.import_module(f".{_LAZY[name]}", __name__), name)
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")


def __dir__():
    return sorted(set(globals()) | set(_LAZY))


__all__ = [
    "Campaign",
    "TrainConfig",
    "WindSettings",
    "analyse_winds",
    "backtest",
    "estimate_effort",
    "labelling_order_study",
    "learning_curve",
    "rank_tiles",
    "read_campaign",
    "route_tiles",
    "run_effort",
    "diagnose_catalogs",
    "error_breakdown",
    "evaluate_model",
    "headline_table",
    "match_objects",
    "plot_error_tiles",
    "render_scene",
    "score_catalogs",
    "split_images",
    "synthesize_tileset",
    "train_model",
    "write_report",
    "write_winds",
]
