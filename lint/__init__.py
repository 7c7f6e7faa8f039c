"""corpuscle: a streaming linter for language-model pretraining shards.

Use from a data-prep job::

    from corpuscle import scan, load_settings
    report = scan(["shards/"], load_settings(eos_id=2, vocab_size=32000))   # corpuscle.toml, then these facts
    report.write_sarif("report.sarif")                                      # also write_json, write_text
    if report.exit_code:
        ...
"""
from corpuscle.engine.scan import Report, scan
from corpuscle.findings import Finding, Level
from corpuscle.gate import BaselineError
from corpuscle.rules.api import Rule, ShardState
from corpuscle.settings import Settings, SettingsError, load_settings
from corpuscle.version import __version__

__all__ = ["scan", "Report", "Finding", "Level", "Settings", "SettingsError", "BaselineError", "load_settings", "Rule",
           "ShardState", "__version__"]
