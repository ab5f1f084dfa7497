"""app/analysis must never import flask or sqlalchemy (DESIGN.md, Architecture)."""

import ast
import subprocess
import sys
from pathlib import Path

ROOT = Path(__file__).resolve().parents[2]
PACKAGE = ROOT / "app" / "analysis"


def test_importing_analysis_pulls_in_neither_flask_nor_sqlalchemy():
    # app/__init__.py builds the Flask app, so load app.analysis under a bare 'app' namespace
    code = (
        "import sys, types\n"
        f"pkg = types.ModuleType('app'); pkg.__path__ = [{str(ROOT / 'app')!r}]\n"
        "sys.modules['app'] = pkg\n"
        "import app.analysis, app.analysis.engine\n"
        "bad = sorted(m for m in sys.modules if m.split('.')[0] in ('flask', 'sqlalchemy'))\n"
        "print(','.join(bad))\n"
    )
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True,
                         cwd=ROOT)
    assert out.stdout.strip() == ""


def test_no_module_in_the_package_names_flask_or_sqlalchemy():
    for path in PACKAGE.rglob("*.py"):
        tree = ast.parse(path.read_text())
        for node in ast.walk(tree):
            names = []
            if isinstance(node, ast.Import):
                names = [a.name for a in node.names]
            elif isinstance(node, ast.ImportFrom) and node.module:
                names = [node.module]
            for name in names:
                assert name.split(".")[0] not in ("flask", "sqlalchemy"), (path, name)
