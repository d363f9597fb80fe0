"""Run every benchmark in this folder (``make bench``); each prints its sizes and ratios.

Each benchmark runs in its own process; its output is shown as it comes.  Result rows
(``row: <name>: <ratio>x (target ...) ok|MISSED``, printed through ``timing.row``) are
repeated in one summary at the end: each ratio against its baseline with the target beside it.
"""
import subprocess
import sys
from pathlib import Path

HERE = Path(__file__).resolve().parent


def run(script):
    """Run one benchmark, echo its output, return (exit status, its result rows)."""
    rows = []
    with subprocess.Popen([sys.executable, str(script)], stdout=subprocess.PIPE, text=True, bufsize=1) as proc:
        for line in proc.stdout:
            print(line, end="", flush=True)
            if line.startswith("row: "):
                rows.append(f"{script.stem}: {line[5:].rstrip()}")
    return proc.returncode, rows


def main():
    status, summary = 0, []
    for script in sorted(HERE.glob("bench_*.py")):
        print(f"\n=== {script.name} ===", flush=True)
        code, rows = run(script)
        status |= code
        summary += rows
    print("\n=== summary: ratio against its baseline (median of interleaved rounds), target ===")
    print("\n".join(summary) if summary else "(no result rows)")
    return status


if __name__ == "__main__":
    sys.exit(main())
