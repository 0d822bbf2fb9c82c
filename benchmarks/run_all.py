"""Run every benchmark in this folder, one after the other: python benchmarks/run_all.py"""

import subprocess
import sys
from pathlib import Path

here = Path(__file__).resolve().parent
for script in sorted(here.glob("bench_*.py")):
    print(f"=== {script.name}", flush=True)
    subprocess.run([sys.executable, str(script), *sys.argv[1:]], check=True)
