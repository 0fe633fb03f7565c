#!/usr/bin/env python3
"""Post each alert's ``message`` from ``ebbwatch scan --format jsonl`` to a chat webhook.

Standard library only.  The webhook URL comes from the environment variable
``EBBWATCH_CHAT_WEBHOOK`` (never from the command line, so it stays out of shell history and
process lists).  Each alert is sent as a JSON body ``{"text": message}``, the shape most chat
services' incoming webhooks accept; adapt ``payload()`` for yours.

    ebbwatch scan --format jsonl | python examples/post_to_chat.py --dry-run
    ebbwatch scan --format jsonl | EBBWATCH_CHAT_WEBHOOK=https://... python examples/post_to_chat.py

Exit codes: 0 all posted (or nothing to post); 1 a post failed; 2 no webhook configured.
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


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--dry-run", action="store_true", help="print what would be posted instead")
    parser.add_argument("--limit", type=int, default=20, help="post at most this many alerts (default 20)")
    args = parser.parse_args(argv)
    url = os.environ.get("EBBWATCH_CHAT_WEBHOOK")
    if not url and not args.dry_run:
        print("post_to_chat: set EBBWATCH_CHAT_WEBHOOK, or use --dry-run", file=sys.stderr)
        return 2
    failed = 0
    for number, line in enumerate(sys.stdin, start=1):
        if number > args.limit:
            print(f"post_to_chat: more alerts than --limit {args.limit}; the rest are not posted", file=sys.stderr)
            break
        line = line.strip()
        if not line:
            continue
        alert = json.loads(line)
        if args.dry_run:
            print(payload(alert).decode("utf-8"))
            continue
        try:
            post(url, payload(alert))
        except OSError as exc:
            failed += 1
            print(f"post_to_chat: alert for {alert.get('account')} not posted: {exc}", file=sys.stderr)
    return 1 if failed else 0


if __name__ == "__main__":
    sys.exit(main())
