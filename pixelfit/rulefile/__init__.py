"""Rule files: versioned JSON with a shipped JSON Schema, numpy-only prediction.

The C export of a rule lives in :mod:`pixelfit.firmware`.
"""

from pixelfit.rulefile._rule import (
    CAUTION,
    MAX_RULE_BYTES,
    RULE_FORMAT,
    RULE_VERSION,
    Rule,
    load_rule,
    parse_rule,
    rule_document,
    save_rung,
    schema,
)

__all__ = ["CAUTION", "MAX_RULE_BYTES", "RULE_FORMAT", "RULE_VERSION", "Rule", "load_rule",
           "parse_rule", "rule_document", "save_rung", "schema"]
