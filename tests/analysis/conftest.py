import sys
from pathlib import Path

# helpers.py sits beside the tests; make it importable without a package __init__.
sys.path.insert(0, str(Path(__file__).parent))
