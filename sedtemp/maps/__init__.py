"""Temperature maps: pixel-by-pixel T, beta and column density from FITS images with WCS.

Public entry points: :func:`fit_maps` (Python), :func:`run_map_workflow`
(a workflow file with a ``[maps]`` section; the ``sedtemp map`` command),
:func:`make_map_demo` and :func:`run_map_demo` (the invented demo cloud;
``sedtemp demo --maps``), and the quick-look figures
:func:`quicklook_figure` / :func:`save_quicklook`.
"""

from .demo import make_map_demo, pull_statistics, run_map_demo
from .field import COMPARE_CODES, compare_pixels
from .figures import quicklook_figure, save_quicklook
from .fitting import default_map_model, fit_maps
from .tiles import FLAG_BITS, SKIP_CODES
from .workflow import load_map_workflow, parse_map_workflow, run_map_workflow

__all__ = [
           "COMPARE_CODES",
           "FLAG_BITS",
           "SKIP_CODES",
           "compare_pixels",
           "default_map_model",
           "fit_maps",
           "load_map_workflow",
           "make_map_demo",
           "parse_map_workflow",
           "pull_statistics",
           "quicklook_figure",
           "run_map_demo",
           "run_map_workflow",
           "save_quicklook",
]
