"""Intended access of the JSON API (/api/v1): reads for anyone signed in, writes for engineers.

The OpenAPI description is for signed-in users and tokens only, like the rest of the API.
"""

POLICY = {
    "api.openapi_document": "signed-in",
    "api.create_study": {"engineer"},
    "api.list_studies": "signed-in",
    "api.get_study": "signed-in",
    "api.upload_data": {"engineer"},
    "api.get_data": "signed-in",
    "api.data_diff": "signed-in",
    "api.create_fit": {"engineer"},
    "api.get_fit": "signed-in",
    "api_runs.page": "signed-in",
    "api_runs.csv": "signed-in",
    "api_predictions.create": "signed-in",
}
