"""User-facing errors: raised by library code, rendered by the CLI as one line and a non-zero exit."""


class CapsweepError(Exception):
    """Base of every error whose message is meant for the user (no traceback shown)."""

    exit_code = 2


class ConfigError(CapsweepError):
    """A sweep file is malformed, names an unknown key, or holds a value out of range."""


class StoreError(CapsweepError):
    """A result store is missing, from another sweep, locked, or damaged."""

    exit_code = 3
