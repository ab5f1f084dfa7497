"""Fits: engineers build fits; every signed-in role may read them."""

POLICY = {
    "fits.builder": {"engineer"},
    "fits.create": {"engineer"},
    "fits.view": "signed-in",
    "fits.charts_json": "signed-in",
    "fits.results_json": "signed-in",
    "fits.record_json": "signed-in",
    "fits.compare": "signed-in",
    "profiler.page": "signed-in",
    "profiler.numbers": "signed-in",
    "reports.fit_pdf": "signed-in",
    "api_reports.fit_pdf": "signed-in",
}
