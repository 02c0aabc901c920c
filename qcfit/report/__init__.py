"""The shift report: one self-contained HTML page per evaluated shift.

``data`` reads one shift (and the shifts before it) from the store into a frozen
:class:`~qcfit.report.data.ReportData`; ``plots`` draws its charts as inline SVG; ``render``
builds the page; ``write`` writes it atomically into the report folder, keeping the last N.
The service calls :func:`~qcfit.report.write.write_after_evaluation` after each catch-up, with
the shifts that catch-up evaluated, in the process that evaluated them (the evaluation child of
``qcfit serve`` on POSIX; in-process for ``serve --once`` and on Windows). ``qcfit evaluate``
writes no reports; ``qcfit report`` writes one on demand.
"""

from qcfit.report.data import ReportData, gather
from qcfit.report.render import render_html
from qcfit.report.write import write_after_evaluation, write_shift_report

__all__ = ["ReportData", "gather", "render_html", "write_after_evaluation", "write_shift_report"]
