"""Plans: engineers on a study's team build them; every signed-in role may read them."""

POLICY = {
    "plans.create": {"engineer"},
    "plans.view": "signed-in",
    "plans.sheet_csv": "signed-in",
    "plans.sheet_pdf": "signed-in",
    "api_plans.create": {"engineer"},
    "api_plans.get": "signed-in",
    "api_plans.sheet_csv": "signed-in",
    "api_plans.sheet_xlsx": "signed-in",
}
