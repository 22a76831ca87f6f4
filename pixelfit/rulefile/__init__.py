"""Rule files: versioned JSON with a shipped JSON Schema, numpy-only prediction, C export."""

from pixelfit.rulefile._export_c import export_c
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

__all__ = ["CAUTION", "MAX_RULE_BYTES", "RULE_FORMAT", "RULE_VERSION", "Rule", "export_c", "load_rule",
           "parse_rule", "rule_document", "save_rung", "schema"]
