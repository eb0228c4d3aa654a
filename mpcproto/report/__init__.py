"""Reports (layer 6): figures, summaries, HTML, JUnit XML.

Figures
    plot_cvs, plot_mvs, plot_comparison (PNG via matplotlib's Agg backend)
"""

from .plots import plot_cvs, plot_mvs, plot_comparison

__all__ = ["plot_cvs", "plot_mvs", "plot_comparison"]
