"""Publication figures: posterior corner plot, SED, comparison, population and trace plots.

Every function builds a :class:`matplotlib.figure.Figure` directly (no pyplot
state, so thousands of figures made in a pipeline do not pile up), draws on
an empty ``fig=`` when one is given, returns the figure and never shows it.
:func:`save_figure` writes it as PDF (vector) and PNG; every plotting
function also takes ``save_to=`` to do that in one call.

The house style (sizes for a journal's single column, inward ticks, a serif
font with matching mathtext) is applied with :func:`matplotlib.rc_context`
while a figure is built and saved, so the user's global ``rcParams`` are never
changed. Colours come from the palette of Okabe & Ito (2008), which stays
distinguishable for the common colour-vision deficiencies; every category
also has its own marker, and the model bands of the SED plot are one hue in
steps of lightness, so the figures survive greyscale printing.

References
----------
Okabe, M. & Ito, K. 2008, "Color Universal Design (CUD): how to make figures
and presentations that are friendly to colorblind people" (palette hex
values from memory).

The functions live in :mod:`sedtemp.plots.source` (one source: corner, SED,
trace), :mod:`sedtemp.plots.catalogue` (comparison, population) and
:mod:`sedtemp.plots._style` (house style, :func:`save_figure`).
"""

from ._style import (  # _SED_COLOURS: the SED plot's colours, checked by the tests
    _SED_COLOURS,  # noqa: F401
    DOUBLE_COLUMN_IN,
    FLAG_STYLES,
    SINGLE_COLUMN_IN,
    save_figure,
)
from .catalogue import comparison_plot, population_plot
from .source import corner_plot, sed_plot, trace_plot

__all__ = [
    "corner_plot",
    "sed_plot",
    "comparison_plot",
    "population_plot",
    "trace_plot",
    "save_figure",
    "FLAG_STYLES",
    "SINGLE_COLUMN_IN",
    "DOUBLE_COLUMN_IN",
]
