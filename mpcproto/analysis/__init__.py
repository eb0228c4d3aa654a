"""Analysis (layer 5): pure functions from a Trajectory to KPIs, violation events and health.

cv_performance, mv_usage, kpis, violations, mv_violations, controller_health, summarize, run_flags,
cv_range
"""

from .kpi import (controller_health, cv_performance, cv_range, kpis, mv_usage, mv_violations,
                  run_flags, summarize, violations)

__all__ = ["cv_performance", "mv_usage", "kpis", "violations", "mv_violations", "controller_health",
           "summarize", "run_flags", "cv_range"]
