"""Rule registry: the built-in rule families plus third-party rules from the entry-point group ``corpuscle.rules``.

Each built-in module lists its rule classes in ``RULES``.  A third-party package exposes, under that group, either
a :class:`corpuscle.rules.api.Rule` subclass or a module with a ``RULES`` list.
"""
from __future__ import annotations

import importlib
from importlib.metadata import entry_points

from corpuscle.rules.api import Rule

#: Built-in rule families, one module each, in the order their rules are listed.
FAMILIES = ("integrity", "separators", "attention", "token_range", "padding", "labels", "text", "lengths",
            "duplicates", "stale_settings", "eval_overlap", "tokenizer_mismatch")

ENTRY_POINT_GROUP = "corpuscle.rules"


def _classes(obj) -> list[type[Rule]]:
    if isinstance(obj, type) and issubclass(obj, Rule):
        return [obj]
    return list(getattr(obj, "RULES", []))


def registry() -> dict[str, type[Rule]]:
    """Rule id -> rule class, built-ins first, then plugins (a plugin cannot replace a built-in id)."""
    found: dict[str, type[Rule]] = {}
    for family in FAMILIES:
        for cls in _classes(importlib.import_module(f"corpuscle.rules.{family}")):
            found[cls.id] = cls
    for ep in entry_points(group=ENTRY_POINT_GROUP):
        try:
            loaded = ep.load()
        except Exception as exc:  # noqa: BLE001 - any import failure of a plugin is a usage problem
            raise PluginError(f"rule plugin {ep.name!r} cannot be loaded: {exc}") from None
        for cls in _classes(loaded):
            if cls.id in found:
                raise PluginError(f"rule plugin {ep.name!r} reuses the rule id {cls.id!r}")
            found[cls.id] = cls
    return found


class PluginError(Exception):
    """A third-party rule that cannot be used (a usage error: fix or uninstall the plugin)."""
