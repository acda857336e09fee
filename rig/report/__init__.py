"""The self-contained HTML report of a run: its tables loaded from the run folder (`data`),
the judgements at a glance (`glance`), the detail tables (`tables`), the figures (`figures`,
`plots`), the HTML pieces and style (`html`), the page assembly (`page`), and the report and
the certificate made together, their figures drawn in worker processes (`documents`).
"""

from rig.report.certificate import (
    CERTIFICATE,
    write_certificate,
)
from rig.report.documents import write_documents
from rig.report.page import (
    FLAG_TEXT,
    SECTIONS,
    write_report,
)

__all__ = [
    "CERTIFICATE",
    "FLAG_TEXT",
    "SECTIONS",
    "write_certificate",
    "write_documents",
    "write_report",
]
