"""Exception types and reject reason codes.

Every library error carries the exit code the CLI maps it to, so the mapping lives in one place
(DESIGN.md: 2 usage or configuration, 3 unusable input or store).
"""

from __future__ import annotations


class EbbwatchError(Exception):
    """Base of every error ebbwatch raises on purpose."""

    exit_code = 3


class UsageError(EbbwatchError):
    """A bad option value or combination; exit code 2."""

    exit_code = 2


class ConfigError(UsageError):
    """A bad configuration file or key; the message names the key and the file."""


class InputError(EbbwatchError):
    """Input that cannot be used at all (nothing was written); exit code 3."""

    exit_code = 3


class StoreError(EbbwatchError):
    """The activity store cannot be opened or is in a state we refuse to touch; exit code 3."""

    exit_code = 3


# Reject reason codes for lines of JSON-lines input.  They are data (written to the rejects file
# and counted in the summary), so they stay stable once published.
REJECT_REASONS = {
    "not_utf8": "the line is not valid UTF-8",
    "not_json": "the line is not valid JSON",
    "not_object": "the line is JSON but not an object",
    "too_long": "the line is over the size limit",
    "missing_field": "a required field is absent, null or empty",
    "wrong_type": "a field has the wrong JSON type",
    "bad_time": "the timestamp cannot be parsed",
    "future_time": "the timestamp is further in the future than the tolerance",
    "past_time": "the timestamp is before the earliest accepted time",
}

# Reasons an otherwise valid event could not be attributed to an account.
UNATTRIBUTED_REASONS = {
    "unknown_user": "no account on the event and the user is not in the identities table",
    "no_identity_at_time": "the user is known but belonged to no account at the event's time",
    "unknown_account": "the account is not in accounts.csv ([ingest] unknown_accounts = \"reject\")",
}
