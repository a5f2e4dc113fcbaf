"""Run every bench/bench_*.py in turn (each in its own interpreter) and pass their lines through.

Usage: python bench/run.py [NAME ...]   (names without the bench_ prefix select a subset)
Exit status: 0 when every benchmark ran, else 1.
"""
from __future__ import annotations

import subprocess
import sys
from pathlib import Path

HERE = Path(__file__).resolve().parent


def main(argv: list[str]) -> int:
    scripts = sorted(HERE.glob("bench_*.py"))
    if argv:
        wanted = {f"bench_{name.removeprefix('bench_').removesuffix('.py')}.py" for name in argv}
        scripts = [s for s in scripts if s.name in wanted]
    failed = []
    for script in scripts:
        print(f"== {script.name}", flush=True)
        done = subprocess.run([sys.executable, str(script)], cwd=HERE.parent)
        if done.returncode:
            failed.append(script.name)
            print(f"!! {script.name} exited with status {done.returncode}", flush=True)
    if failed:
        print(f"failed: {', '.join(failed)}")
    return 1 if failed else 0


if __name__ == "__main__":
    sys.exit(main(sys.argv[1:]))
