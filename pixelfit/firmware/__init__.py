"""Firmware: what ships to a microcontroller. The integer-only C99 export of a rule file, its test
vectors, and its exact cost (flash, RAM, operations)."""

from pixelfit.firmware._export_c import (
    c_identifier,
    cost,
    cost_of_document,
    default_vectors,
    export_c,
    header_text,
    vectors_text,
)

__all__ = ["c_identifier", "cost", "cost_of_document", "default_vectors", "export_c", "header_text", "vectors_text"]
