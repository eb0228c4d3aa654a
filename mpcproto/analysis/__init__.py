"""Analysis (layer 5): pure functions from a Trajectory to KPIs, violation events and health.

cv_performance, mv_usage, kpis, violations, controller_health, summarize
"""

from .kpi import cv_performance, mv_usage, kpis, violations, controller_health, summarize

__all__ = ["cv_performance", "mv_usage", "kpis", "violations", "controller_health", "summarize"]
