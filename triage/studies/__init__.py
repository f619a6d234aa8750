"""The studies, one module per study: what it runs, the section it writes into summary.json
(a typed dataclass with to_json / from_json) and how the report shows it (`view`).

STUDIES maps each summary key to its study module, in the order the report shows them;
SECTIONS maps the same keys to the section classes (for reading summary.json back).
"""

from __future__ import annotations

from types import ModuleType

from triage.studies import beam_curve, exact, length_penalty, reproduce, where_lost, widen
from triage.studies.beam_curve import BeamCurveSection
from triage.studies.exact import ExactSection
from triage.studies.length_penalty import LengthPenaltySection
from triage.studies.reproduce import ReproductionSection
from triage.studies.where_lost import WhereLostSection
from triage.studies.widen import WidenSection

STUDIES: dict[str, ModuleType] = {m.NAME: m for m in (reproduce, widen, beam_curve, length_penalty, where_lost, exact)}
SECTIONS: dict[str, type] = {
    "reproduction": ReproductionSection,
    "widen": WidenSection,
    "beam_curve": BeamCurveSection,
    "length_penalty": LengthPenaltySection,
    "where_lost": WhereLostSection,
    "exact": ExactSection,
}

__all__ = ["SECTIONS", "STUDIES", "BeamCurveSection", "ExactSection", "LengthPenaltySection", "ReproductionSection",
           "WhereLostSection", "WidenSection"]
