"""Run every benchmark: ``python -m benchmarks`` (``make bench``).

Each ``bench_*.py`` file is a script that measures ratios side by side in one run and
prints them; none of them is a test, and none asserts on absolute time.
"""

from __future__ import annotations

import runpy
import sys
from pathlib import Path


def main(argv: list[str]) -> int:
    here = Path(__file__).parent
    wanted = set(argv)
    scripts = sorted(p for p in here.glob("bench_*.py") if not wanted or p.stem in wanted)
    failed = []
    unknown = wanted - {p.stem for p in here.glob("bench_*.py")}
    if unknown:
        print(f"no such benchmark: {', '.join(sorted(unknown))}", file=sys.stderr)
        return 2
    for script in scripts:
        print(f"\n=== {script.stem} ===", flush=True)
        saved = sys.argv
        sys.argv = [str(script)]  # each script sees only its own name, not the selection
        try:
            runpy.run_path(str(script), run_name="__main__")
        except SystemExit as exc:  # a script's own exit code: note it, run the others
            if exc.code not in (None, 0):
                failed.append(script.stem)
        finally:
            sys.argv = saved
    if failed:
        print(f"\nbenchmarks that reported a missed target or an error: {', '.join(failed)}")
    return 1 if failed else 0


if __name__ == "__main__":
    raise SystemExit(main(sys.argv[1:]))
