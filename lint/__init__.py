"""corpuscle: a streaming linter for language-model pretraining shards.

Use from a data-prep job::

    from corpuscle import scan, load_settings
    report = scan(["shards/"], load_settings(eos_id=2, vocab_size=32000))
    if report.exit_code:
        ...
"""
from corpuscle.engine.scan import Report, scan
from corpuscle.findings import Finding, Level
from corpuscle.rules.api import Rule, ShardState
from corpuscle.settings import Settings, SettingsError, load_settings
from corpuscle.version import __version__

__all__ = ["scan", "Report", "Finding", "Level", "Settings", "SettingsError", "load_settings", "Rule", "ShardState",
           "__version__"]
