"""The protocol stage: the frozen typed objects (:mod:`.model`), the field collector
(:mod:`.collector`) and the reader that validates a YAML file into them (:mod:`.reader`)."""

from emulant.protocol.model import (
    Concept,
    Covariate,
    MeasuredOutcome,
    Protocol,
    ProtocolError,
    Subgroup,
    outcome_name,
)
from emulant.protocol.reader import load_protocol, parse_protocol

__all__ = ["Concept", "Covariate", "MeasuredOutcome", "Protocol", "ProtocolError", "Subgroup",
           "load_protocol", "outcome_name", "parse_protocol"]
