"""The pipeline layer: workflows, catalogues, the stages, the batch runner and its records.

Modules (one idea each):

* :mod:`~sedtemp.pipeline.config`: the workflow schema (TOML) and its builders;
* :mod:`~sedtemp.pipeline.checks`: value checks that would make every source fail;
* :mod:`~sedtemp.pipeline.catalog`: reading, validating and mapping catalogues;
* :mod:`~sedtemp.pipeline.schema`: every results column's unit, description, format, UCD;
* :mod:`~sedtemp.pipeline.stages`: fit, predict and compare over one chunk;
* :mod:`~sedtemp.pipeline.sources`: one source in full (FitResult, figures);
* :mod:`~sedtemp.pipeline.executors`: where chunks run (strategy objects);
* :mod:`~sedtemp.pipeline.checkpoints`: the folder lock, input digests, parts, resume;
* :mod:`~sedtemp.pipeline.report`: progress, run summary and report;
* :mod:`~sedtemp.pipeline.figures`: catalogue and per-source plots of a run;
* :mod:`~sedtemp.pipeline.batch`: the chunked run over an executor;
* :mod:`~sedtemp.pipeline.api`: ``run``, ``fit``, ``predict``, ``compare``.

Every source gets its own random stream (:func:`sedtemp.seeds.source_seed`),
so a source's result does not depend on its chunk or worker.
"""

from ..seeds import source_seed
from .api import compare, fit, predict, run
from .batch import check_optional_packages, run_batch, run_metadata
from .catalog import MappedCatalog, map_catalog, read_catalog, source_key, write_table
from .config import (
    NON_RESULT_KEYS,
    OUTPUT_FORMATS,
    SOURCE_PLOT_CHOICES,
    Workflow,
    load_workflow,
    lookup_model,
    parse_quantity,
    parse_workflow,
)
from .executors import EXECUTORS, InlineExecutor, open_executor
from .figures import SOURCES_DIR, catalogue_plots, select_plot_sources
from .report import RunTally, run_summary, summary_lines, write_report
from .schema import RENAMES, STATUS_FAILED, STATUS_OK, STATUS_SKIPPED
from .sources import (
    grid_result,
    plot_source,
    refit_source,
    source_plot_stem,
    source_result,
    t_eq_band,
)
from .stages import process_chunk, source_field

#: The radiation field of source ``i`` of a mapped catalogue (name kept from version 0.1).
build_field = source_field

__all__ = [
    "EXECUTORS",
    "NON_RESULT_KEYS",
    "OUTPUT_FORMATS",
    "RENAMES",
    "SOURCES_DIR",
    "SOURCE_PLOT_CHOICES",
    "STATUS_FAILED",
    "STATUS_OK",
    "STATUS_SKIPPED",
    "InlineExecutor",
    "MappedCatalog",
    "Workflow",
    "build_field",
    "catalogue_plots",
    "check_optional_packages",
    "compare",
    "fit",
    "grid_result",
    "load_workflow",
    "lookup_model",
    "map_catalog",
    "open_executor",
    "parse_quantity",
    "parse_workflow",
    "plot_source",
    "predict",
    "process_chunk",
    "read_catalog",
    "refit_source",
    "run",
    "run_batch",
    "run_metadata",
    "RunTally",
    "run_summary",
    "select_plot_sources",
    "source_field",
    "source_key",
    "source_plot_stem",
    "source_result",
    "source_seed",
    "summary_lines",
    "t_eq_band",
    "write_report",
    "write_table",
]
