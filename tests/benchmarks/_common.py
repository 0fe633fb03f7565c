"""Helpers shared by the hand-run benchmarks: peak memory of a child process, timing."""

from __future__ import annotations

import json
import subprocess
import sys
import textwrap


def run_measured(code: str) -> dict:
    """Run Python ``code`` in a fresh interpreter; it must print one JSON object as its last line.

    Adds ``peak_rss_mb``: the child's peak resident set (VmHWM from /proc/self/status; Linux's
    getrusage high-water mark survives exec, so it would include the parent's size at fork).
    """
    wrapper = textwrap.dedent(code) + textwrap.dedent("""
        import json as _j, re as _re
        _hwm = int(_re.search(r"VmHWM:\\s+(\\d+)", open("/proc/self/status").read()).group(1))
        print(_j.dumps({**RESULT, "peak_rss_mb": _hwm / 1024}))
    """)
    out = subprocess.run([sys.executable, "-c", wrapper], capture_output=True, text=True)
    if out.returncode != 0:
        raise RuntimeError(out.stderr[-3000:])
    last = out.stdout.strip().splitlines()[-1] if out.stdout.strip() else ""
    try:
        return json.loads(last)
    except json.JSONDecodeError as exc:
        raise RuntimeError(f"the child's last line is not its JSON result: {last[:300]!r}") from exc
