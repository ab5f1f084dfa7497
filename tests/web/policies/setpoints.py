"""Setpoints: engineers propose and record confirmation runs, approvers sign (release for
confirmation, confirm for production, return, withdraw).

Anyone signed in reads.
"""

POLICY = {
    "setpoints.new": {"engineer"},
    "setpoints.view": "signed-in",
    "setpoints.design_space_page": "signed-in",
    "setpoints.sign": {"approver"},
    "setpoints.confirm": {"engineer"},
    "setpoints.export_csv": "signed-in",
    "setpoints.export_json": "signed-in",
    "api_setpoints.create": {"engineer"},
    "api_setpoints.get": "signed-in",
    "api_setpoints.release": {"approver"},
    "api_setpoints.confirmations_upload": {"engineer"},
    "api_setpoints.export": "signed-in",
    "reports.setpoint_pdf": "signed-in",
    "api_reports.setpoint_pdf": "signed-in",
}
