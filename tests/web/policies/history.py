"""Intended access of the history views: the auditor only, read-only (DESIGN.md)."""

POLICY = {
    "history.study": {"auditor"},
    "history.event": {"auditor"},
    "history.export_csv": {"auditor"},
    "history.export_json": {"auditor"},
    "history.integrity": {"auditor"},
    "history.reproduce": {"auditor"},
    "history.package": {"auditor"},
}
