"""Former home of the sweeps; the studies now live one per module (widen, beam_curve,
length_penalty), the option parsing and the estimate in plan, the running in runner.
These names stay importable from here until every caller has moved."""

from triage.studies.length_penalty import DEFAULT_ALPHAS, FORMS, PenaltyTally  # noqa: F401
from triage.studies.plan import estimate_seconds, parse_alphas, parse_widths  # noqa: F401
from triage.studies.runner import SUMMARY_KEYS, Sweeps, merge_sweeps, run_sweeps  # noqa: F401
