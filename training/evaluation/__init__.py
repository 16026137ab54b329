"""Scoring a model: matching and metrics, the evaluation run, its report, where features are lost, the benchmark.

Names load their module on first use.
"""

from detector._lazy import lazy_exports

__getattr__, __dir__ = lazy_exports(__name__, {
    "bootstrap_interval": "bootstrap",
    "match_objects": "matching",
    "score_catalogs": "scoring",
    "evaluate_model": "evaluate",
    "run_on_tiles": "evaluate",
    "headline_table": "report",
    "write_report": "report",
    "diagnose_catalogs": "diagnose",
    "error_breakdown": "diagnose",
    "plot_error_tiles": "diagnose",
    "benchmark_table": "benchmark",
    "build_benchmark": "benchmark",
    "run_benchmark": "benchmark",
})

__all__ = [
    "benchmark_table",
    "bootstrap_interval",
    "build_benchmark",
    "diagnose_catalogs",
    "error_breakdown",
    "evaluate_model",
    "headline_table",
    "match_objects",
    "plot_error_tiles",
    "run_benchmark",
    "run_on_tiles",
    "score_catalogs",
    "write_report",
]
