"""Helpers shared by the hand-run benchmarks: peak memory of a child process, timing."""

from __future__ import annotations

import json
import subprocess
import sys
import textwrap


def run_measured(code: str) -> dict:
    """Run Python ``code`` in a fresh interpreter; it must print one JSON object as its last line.

    Adds ``peak_rss_mb`` (the child's maximum resident set size, from getrusage).
    """
    wrapper = textwrap.dedent(code) + textwrap.dedent("""
        import resource as _r, json as _j
        print(_j.dumps({**RESULT, "peak_rss_mb": _r.getrusage(_r.RUSAGE_SELF).ru_maxrss / 1024}))
    """)
    out = subprocess.run([sys.executable, "-c", wrapper], capture_output=True, text=True)
    if out.returncode != 0:
        raise RuntimeError(out.stderr[-3000:])
    return json.loads(out.stdout.strip().splitlines()[-1])
