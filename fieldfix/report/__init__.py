"""Quality reports: the numbers a physicist checks, the views that show them, one HTML page.

:func:`build_report` reads fieldfix job summaries (a folder, or explicit summary files),
measures what the report adds once, and writes three files beside each other:

``report.html``
    One self-contained page (images as ``data:`` URIs, its own style sheet and script
    inline and allowed by hash in its Content-Security-Policy, no outside source). It
    opens with four questions answered at a glance (is the field plausible? did the
    correction help where voxels moved? where will signal be lost? anything suspicious?),
    then one section per question: panel grids with a shared crosshair, orientation
    letters and slice positions in mm on every panel, the line profile through the
    largest shift, the protocol each prediction was made for.
``report_summary.png``
    The figure for papers (orientation letters, positions in mm, colour bars with units,
    a retention slice where signal is lost).
``report.json``
    Every number the page shows (:class:`fieldfix.outputs.ReportSummary`).

Modules: :mod:`.sources` (which summaries, which files they let the report open),
:mod:`.measure` and :mod:`.runs` (numbers and views, computed once), :mod:`.agreement`
(edge agreement, Haber and Modersitzki 2006), :mod:`.headline`, :mod:`.checks`,
:mod:`.orientation`, :mod:`.figures` (every matplotlib figure of fieldfix, also the plan's
trade-offs and the batch's group strips), :mod:`.render`, :mod:`.view` and :mod:`.page`
(the template), :mod:`.build`.

Research software, not a medical device.

Examples
--------
>>> folder, files = report_files("derivatives/fieldfix", "qa/sub-01.html")  # where a page would go
>>> str(folder), files.html, files.png, files.json
('qa', 'sub-01.html', 'sub-01_summary.png', 'sub-01.json')
"""

from ..outputs import CAUTION
from .agreement import edge_agreement, edge_agreement_by_slice, moved_region
from .build import MAX_PAGE_BYTES, build_report, report_files
from .sources import field_map_summary_beside, gather, read_summary, summary_paths
from .view import format_number, lookup

__all__ = ["CAUTION", "build_report", "report_files", "MAX_PAGE_BYTES", "edge_agreement", "edge_agreement_by_slice",
           "moved_region", "summary_paths", "field_map_summary_beside", "gather", "read_summary", "format_number",
           "lookup"]
