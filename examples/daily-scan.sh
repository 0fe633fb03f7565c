#!/usr/bin/env bash
# A daily cron job: ingest the new telemetry, scan, post new and escalated alerts to chat once,
# leave a heartbeat.
#
#   # crontab -e  (06:15 every day; cron mails whatever this prints)
#   15 6 * * *  /opt/ebbwatch/examples/daily-scan.sh >> /var/log/ebbwatch.log 2>&1
#
# Settings (environment):
#   EBBWATCH_DB            the store (default ./ebbwatch.duckdb)
#   EVENTS_DIR             where the day's .jsonl.gz files land (default ./incoming)
#   EBBWATCH_CHAT_WEBHOOK  the chat webhook URL (unset: alerts are printed, not posted)
#   POSTED_LEDGER          alerts already posted, so none is posted twice (default ./ebbwatch-posted.jsonl)
#   HEARTBEAT_FILE         touched after a successful run, for a monitor to watch
set -euo pipefail
here="$(cd "$(dirname "$0")" && pwd)"
events_dir="${EVENTS_DIR:-./incoming}"
ledger="${POSTED_LEDGER:-./ebbwatch-posted.jsonl}"
heartbeat="${HEARTBEAT_FILE:-./ebbwatch.heartbeat}"

# Files already ingested are recognised by content and skipped, so re-running is safe.
ebbwatch ingest "$events_dir" --format json > ebbwatch-ingest-summary.json
new_files="$(python3 -c 'import json, sys; print(json.load(open(sys.argv[1]))["files"])' ebbwatch-ingest-summary.json)"

if [ "$new_files" = "0" ]; then
    # Nothing new since the last run: the day's judgement would be the same, and was posted.
    echo "daily-scan: no new file in $events_dir; scan skipped"
else
    # The scan prints new and escalated alerts; the ledger keeps a second run on the same day
    # (after a late file) from posting them again.
    if [ -n "${EBBWATCH_CHAT_WEBHOOK:-}" ]; then
        ebbwatch scan --format jsonl | python3 "$here/post_to_chat.py" --ledger "$ledger"
    else
        ebbwatch scan --format jsonl | python3 "$here/post_to_chat.py" --ledger "$ledger" --dry-run
    fi
fi

# Cron only reports failures by mail; a heartbeat lets a monitor notice a job that stopped running.
touch "$heartbeat"
