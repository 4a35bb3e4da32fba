"""Temperature maps: pixel-by-pixel T, beta and column density from FITS images with WCS.

Public entry points: :func:`fit_maps` (Python), :func:`run_map_workflow`
(a workflow file with a ``[maps]`` section; the ``sedtemp map`` command),
:func:`make_map_demo` and :func:`run_map_demo` (the invented demo cloud;
``sedtemp demo --maps``), and the quick-look figures of :mod:`.figures`.
"""

from .fitting import default_map_model, fit_maps

__all__ = ["fit_maps", "default_map_model"]
