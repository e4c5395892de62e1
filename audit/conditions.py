"""Map phase labels to conditions (baseline or treatment) and normalise design names."""

from __future__ import annotations

import re
from typing import Mapping

_BASELINE_WORDS = {"baseline", "base", "bl", "base line", "pre", "pretest", "pre-test", "withdrawal", "return to baseline"}
_TREATMENT_WORDS = {"treatment", "intervention", "tx", "trt", "int", "treat"}
_BASELINE_LABEL = re.compile(r"^a[\s_\-]?\d*'?$")  # A, A1, A2, A-2, A'
_TREATMENT_LABEL = re.compile(r"^[b-z][\s_\-]?\d*'?$")  # B, B1, C, C2, B'

CONDITION_SYNONYMS = {"baseline": "baseline", "treatment": "treatment", "intervention": "treatment"}

_DESIGN_SYNONYMS = {
    "ab": "AB", "aba": "ABA", "abab": "ABAB", "ababab": "ABABAB", "abc": "ABC", "bab": "BAB",
    "reversal": "reversal", "withdrawal": "reversal",
    "multiple_baseline": "multiple_baseline", "multiple_baseline_design": "multiple_baseline",
    "mbd": "multiple_baseline", "mb": "multiple_baseline", "multiple_probe": "multiple_probe",
    "alternating": "alternating", "alternating_treatments": "alternating",
    "alternating_treatment": "alternating", "atd": "alternating",
    "changing_criterion": "changing_criterion", "ccd": "changing_criterion",
}


def condition_from_label(label: str, phase_map: Mapping[str, str]) -> str | None:
    """Condition of a phase label: the config's [phases] map first, then the usual letters.

    A-type labels (A, A1, A2, 'baseline') are baseline; B, C, ... (with optional numbers) and
    'treatment'/'intervention' are treatment. Anything else is ambiguous and returns None.
    """
    key = label.strip().lower()
    if key in phase_map:
        return phase_map[key]
    if key in _BASELINE_WORDS or _BASELINE_LABEL.match(key):
        return "baseline"
    if key in _TREATMENT_WORDS or _TREATMENT_LABEL.match(key):
        return "treatment"
    return None


def normalise_condition(value: str) -> str:
    """'Baseline' -> 'baseline', 'Intervention' -> 'treatment'; unknown words pass unchanged (lower-cased)."""
    key = value.strip().lower()
    return CONDITION_SYNONYMS.get(key, key)


def normalise_design(value: str) -> str:
    """Canonical design name: AB, ABA, ABAB, multiple_baseline, alternating, changing_criterion, ...

    Unknown names are kept in lower case with spaces as underscores.
    """
    key = re.sub(r"[\s\-]+", "_", value.strip().lower())
    if key in _DESIGN_SYNONYMS:
        return _DESIGN_SYNONYMS[key]
    if re.fullmatch(r"[ab]+", key):
        return key.upper()
    return key


def design_from_conditions(conditions: list[str]) -> str:
    """Infer a design name from the sequence of phase conditions, e.g. ['baseline', 'treatment'] -> 'AB'."""
    letters = "".join("A" if c == "baseline" else "B" for c in conditions)
    return letters if len(letters) <= 6 else "other"
