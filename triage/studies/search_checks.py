"""Former home of the search checks; they now live in where_lost and exact, run by runner.
This name stays importable from here until every caller has moved."""

from triage.studies.runner import run_search_checks  # noqa: F401
