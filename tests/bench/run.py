"""`make bench`: every benchmark, each comparing against a baseline measured in the same run."""

from __future__ import annotations

import subprocess
import sys
from pathlib import Path

HERE = Path(__file__).resolve().parent


def main() -> int:
    status = 0
    for script in ("bench_analysis.py", "bench_load.py", "bench_scale.py", "bench_verify.py"):
        print(f"== {script}", flush=True)
        status |= subprocess.run([sys.executable, str(HERE / script)], check=False).returncode
    return status


if __name__ == "__main__":
    sys.exit(main())
