#!/usr/bin/env python3
"""Post each alert's ``message`` from ``ebbwatch scan --format jsonl`` to a chat webhook.

Standard library only.  The webhook URL comes from the environment variable
``EBBWATCH_CHAT_WEBHOOK`` (never from the command line, so it stays out of shell history and
process lists).  Each alert is sent as a JSON body ``{"text": message}``, the shape most chat
services' incoming webhooks accept; adapt ``payload()`` for yours.

    ebbwatch scan --format jsonl | python examples/post_to_chat.py --dry-run
    ebbwatch scan --format jsonl | EBBWATCH_CHAT_WEBHOOK=https://... python examples/post_to_chat.py
    ebbwatch scan --format jsonl | python examples/post_to_chat.py --ledger posted.jsonl

With ``--ledger FILE`` every alert posted is noted there (its day, account, direction and
state) and an alert already noted is not posted again, so a job run twice on one day posts
nothing the second time; an alert that escalates is a new state and is posted.

Exit codes: 0 all posted (or nothing to post); 1 a post failed; 2 no webhook configured, or
input that is not ``ebbwatch scan --format jsonl``.
"""

from __future__ import annotations

import argparse
import json
import os
import sys
import time
import urllib.request

MAX_MESSAGE_CHARS = 1500  # chat services cap message length; keep each alert short


def payload(alert: dict) -> bytes:
    return json.dumps({"text": alert["message"][:MAX_MESSAGE_CHARS]}).encode("utf-8")


def post(url: str, body: bytes, attempts: int = 3) -> None:
    request = urllib.request.Request(url, data=body, headers={"Content-Type": "application/json"})
    for attempt in range(1, attempts + 1):
        try:
            with urllib.request.urlopen(request, timeout=10) as response:
                if 200 <= response.status < 300:
                    return
                raise OSError(f"HTTP {response.status}")
        except OSError as exc:
            if attempt == attempts:
                raise
            time.sleep(2 ** attempt)


EXPECTED = "one alert object per line, as `ebbwatch scan --format jsonl` prints"


def read_alerts(lines) -> list[dict]:
    """The alerts of ``lines``; ValueError naming the first line that is not one."""
    alerts = []
    for number, line in enumerate(lines, start=1):
        line = line.strip()
        if not line:
            continue
        try:
            alert = json.loads(line)
        except json.JSONDecodeError:
            raise ValueError(f"line {number} is not JSON ({line[:40]!r}); expected {EXPECTED}") from None
        if not isinstance(alert, dict) or not isinstance(alert.get("message"), str):
            raise ValueError(f"line {number} has no \"message\" text; expected {EXPECTED}")
        alerts.append(alert)
    return alerts


def ledger_key(alert: dict) -> str:
    return json.dumps([alert.get("as_of"), alert.get("account"), alert.get("direction"), alert.get("state")])


def read_ledger(path) -> set:
    if not path or not os.path.exists(path):
        return set()
    with open(path, encoding="utf-8") as handle:
        return {line.strip() for line in handle if line.strip()}


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--dry-run", action="store_true", help="print what would be posted instead")
    parser.add_argument("--limit", type=int, default=20, help="post at most this many alerts (default 20)")
    parser.add_argument("--ledger", help="file of alerts already posted: post each alert once")
    args = parser.parse_args(argv)
    url = os.environ.get("EBBWATCH_CHAT_WEBHOOK")
    if not url and not args.dry_run:
        print("post_to_chat: set EBBWATCH_CHAT_WEBHOOK, or use --dry-run", file=sys.stderr)
        return 2
    try:
        alerts = read_alerts(sys.stdin)
    except ValueError as exc:
        print(f"post_to_chat: {exc}; nothing was posted", file=sys.stderr)
        return 2
    posted_before = read_ledger(args.ledger)
    fresh = [a for a in alerts if ledger_key(a) not in posted_before]
    if len(fresh) < len(alerts):
        print(f"post_to_chat: {len(alerts) - len(fresh)} alert(s) already posted, not repeated", file=sys.stderr)
    if len(fresh) > args.limit:
        print(f"post_to_chat: more alerts than --limit {args.limit}; the rest are not posted", file=sys.stderr)
    failed = 0
    for alert in fresh[:args.limit]:
        if args.dry_run:
            print(payload(alert).decode("utf-8"))
        else:
            try:
                post(url, payload(alert))
            except OSError as exc:
                failed += 1
                print(f"post_to_chat: alert for {alert.get('account')} not posted: {exc}", file=sys.stderr)
                continue
        if args.ledger and not args.dry_run:  # a dry run shows what would be posted; it posts nothing
            with open(args.ledger, "a", encoding="utf-8") as handle:
                handle.write(ledger_key(alert) + "\n")
    return 1 if failed else 0


if __name__ == "__main__":
    sys.exit(main())
