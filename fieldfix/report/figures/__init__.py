"""fieldfix's one home for matplotlib figures (Agg canvas, no pyplot, math text off for names).

* :mod:`.panels`: axial slice panels with orientation letters and slice positions in mm,
  colour bars, reference edges (:func:`panel_png`, :func:`colourbar_png`, :class:`Scale`);
* :mod:`.charts`: the field histogram, the line profile, the planning job's trade-off
  figure (:func:`tradeoff_figure`) and the batch's group figure (:func:`group_figure`);
* :mod:`.paper`: the report's figure for papers (:func:`summary_figure`).
"""

from .style import figure_png, literal
from .charts import Profile, field_histogram, group_figure, profile_figure, tradeoff_figure
from .paper import PaperPanel, summary_figure
from .panels import Layers, Scale, colourbar_png, draw_axial, panel_figure, panel_png, pick_slices, reference_edges

__all__ = ["figure_png", "literal", "Profile", "field_histogram", "group_figure", "profile_figure",
           "tradeoff_figure", "PaperPanel", "summary_figure", "Layers", "Scale", "colourbar_png", "draw_axial",
           "panel_figure", "panel_png", "pick_slices", "reference_edges"]
