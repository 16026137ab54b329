"""The volunteer effort left: the campaign, routes with measured promises, presence, the backtest,
where the next volunteer hour goes (ranking, labelling order) and the learning curve.

Names load their module on first use. The backtest is :func:`training.effort.backtest.backtest`
(also :func:`training.backtest`).
"""

from detector._lazy import lazy_exports

__getattr__, __dir__ = lazy_exports(__name__, {
    "Campaign": "campaign",
    "read_campaign": "campaign",
    "estimate_effort": "estimate",
    "route_tiles": "routing",
    "run_effort": "effort",
    "presence_coefficients": "presence",
    "labelling_order_study": "active",
    "rank_tiles": "active",
    "learning_curve": "curve",
})

__all__ = [
    "Campaign",
    "estimate_effort",
    "labelling_order_study",
    "learning_curve",
    "presence_coefficients",
    "rank_tiles",
    "read_campaign",
    "route_tiles",
    "run_effort",
]
