"""corpuscle: a streaming linter for language-model pretraining shards.

Use from a data-prep job::

    from lint import scan, Settings
    report = scan(["shards/"], Settings(eos_id=2, vocab_size=32000))
    if report.exit_code:
        ...
"""
__version__ = "0.1.0"

from .engine import Report, scan  # noqa: E402
from .findings import Finding, Level  # noqa: E402
from .settings import Settings  # noqa: E402

__all__ = ["scan", "Report", "Finding", "Level", "Settings", "__version__"]
