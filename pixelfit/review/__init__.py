"""The review page: one self-contained HTML file per ``pixelfit fit`` run, for the person who signs off.

:func:`write_report` is the one way to make it: the command line (``pixelfit report``, ``fit
--report``) and the window's *Export review report…* all call it on a run folder.
"""

from pixelfit.review._page import (
    NOT_COMPUTED,
    REPORT_NAME,
    library_versions,
    load_run_data,
    read_split,
    read_summary,
    render_report,
    report_context,
    write_report,
)

__all__ = ["NOT_COMPUTED", "REPORT_NAME", "library_versions", "load_run_data", "read_split", "read_summary",
           "render_report", "report_context", "write_report"]
