#!/usr/bin/env bash
# A daily cron job: ingest yesterday's telemetry, scan, post new alerts to chat, leave a heartbeat.
#
#   # crontab -e  (06:15 every day; cron mails whatever this prints)
#   15 6 * * *  /opt/ebbwatch/examples/daily-scan.sh >> /var/log/ebbwatch.log 2>&1
#
# Settings (environment):
#   EBBWATCH_DB            the store (default ./ebbwatch.duckdb)
#   EVENTS_DIR             where the day's .jsonl.gz files land (default ./incoming)
#   EBBWATCH_CHAT_WEBHOOK  the chat webhook URL (unset: alerts are printed, not posted)
#   HEARTBEAT_FILE         touched after a successful run, for a monitor to watch
set -euo pipefail
here="$(cd "$(dirname "$0")" && pwd)"
events_dir="${EVENTS_DIR:-./incoming}"
heartbeat="${HEARTBEAT_FILE:-./ebbwatch.heartbeat}"

# Files already ingested are recognised by content and skipped, so re-running is safe.
ebbwatch ingest "$events_dir" --format json > ebbwatch-ingest-summary.json

if [ -n "${EBBWATCH_CHAT_WEBHOOK:-}" ]; then
    ebbwatch scan --format jsonl | python3 "$here/post_to_chat.py"
else
    ebbwatch scan --format jsonl | python3 "$here/post_to_chat.py" --dry-run
fi

# Cron only reports failures by mail; a heartbeat lets a monitor notice a job that stopped running.
touch "$heartbeat"
