"""Firmware: what ships to a microcontroller. The C99 export of a rule file and its test vectors."""

from pixelfit.firmware._export_c import c_identifier, default_vectors, export_c, header_text, vectors_text

__all__ = ["c_identifier", "default_vectors", "export_c", "header_text", "vectors_text"]
