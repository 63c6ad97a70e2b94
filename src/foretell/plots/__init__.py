"""Every figure foretell draws: matplotlib Figures on an Agg canvas, never through pyplot."""

from .common import HEATMAP, OKABE_ITO, figure_png, new_figure

__all__ = ["HEATMAP", "OKABE_ITO", "figure_png", "new_figure"]
