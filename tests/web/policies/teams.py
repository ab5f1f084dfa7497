"""Study teams: anyone who may read a study reads its team; the owner (an engineer) or an admin
changes it. Who of those may change which study is the team rule (app.workflow.teams), tested
in tests/web/test_teams.py and the membership part of tests/web/test_route_matrix.py."""

POLICY = {
    "studies.add_member": {"engineer", "admin"},
    "studies.remove_member": {"engineer", "admin"},
    "api_teams.list_members": "signed-in",
    "api_teams.add_member": {"engineer", "admin"},
    "api_teams.remove_member": {"engineer", "admin"},
}
