"""The smallest valid protocol: two arms (drug_a treated, drug_b) and an event outcome, with
invented codes. Tests that need a Protocol object but no extract build theirs from it."""

from __future__ import annotations

from typing import Any

from emulant.protocol import Protocol, parse_protocol


def two_arm_protocol(study_id: str, extra_concepts: dict | None = None, text: str = "",
                     **sections: Any) -> Protocol:
    """``sections`` replace whole top-level keys of the protocol; ``extra_concepts`` add concepts."""
    base: dict[str, Any] = {
        "study": {"id": study_id},
        "concepts": {"drug_a": {"source": "dispensings", "codes": ["XA1"]},
                     "drug_b": {"source": "dispensings", "codes": ["XB1"]},
                     "event": {"source": "diagnoses", "codes": ["EV1"]},
                     **(extra_concepts or {})},
        "eligibility": {"entry": {"start": "2016-01-01", "end": "2021-12-31"}},
        "strategies": {"arms": {"drug_a": {"initiate": "drug_a"}, "drug_b": {"initiate": "drug_b"}},
                       "treated": "drug_a"},
        "outcomes": {"primary": "event"},
    }
    return parse_protocol({**base, **sections}, ".", None, text)
