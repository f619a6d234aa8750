"""Two run folders compared: verdict transitions, buckets, fixed and broken rows, the corpus metric's
paired bootstrap, and whether the first run's recommendation was followed (no model needed)."""

from triage.compare.core import Comparison, DataMismatchError, compare_runs, parse_labels, summary_paragraph
from triage.compare.load import RunFolderError, load_run_folder
from triage.compare.page import render_compare, schema, write_comparison

__all__ = ["Comparison", "DataMismatchError", "RunFolderError", "compare_runs", "load_run_folder",
           "parse_labels", "render_compare", "schema", "summary_paragraph", "write_comparison"]
