"""Run every benchmark in this folder (``make bench``); each prints its sizes and ratios."""
import subprocess
import sys
from pathlib import Path

HERE = Path(__file__).resolve().parent


def main():
    status = 0
    for script in sorted(HERE.glob("bench_*.py")):
        print(f"\n=== {script.name} ===", flush=True)
        status |= subprocess.call([sys.executable, str(script)])
    return status


if __name__ == "__main__":
    sys.exit(main())
