"""Diagnostics of acceleration structures: cost heat maps, side-by-side comparison, build statistics.

- `write_heatmaps`, `value_range`: false-colour maps of per-pixel cost on one shared colour scale.
- `log2_cost_ratio`: the per-pixel log2 ratio of two cost images (the compare ratio map).
- `run_compare`, `run_inspect`: the `tracer compare` and `tracer inspect` commands.
- `write_report`: the self-contained HTML report of a comparison.
"""
from tracer.diagnostics.compare import log2_cost_ratio, run_compare, run_inspect, stats_table
from tracer.diagnostics.heatmap import value_range, write_heatmaps
from tracer.diagnostics.report import write_report

__all__ = ["log2_cost_ratio", "run_compare", "run_inspect", "stats_table", "value_range", "write_heatmaps",
           "write_report"]
