"""Errors that stop a run before it scans, each a usage problem the user can fix (exit status 2)."""


class SettingsError(Exception):
    """A setting that cannot be used (bad config file, bad value): a usage error, exit status 2."""
