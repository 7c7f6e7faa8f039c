"""Settings: the facts of a shard (columns, special ids, window length, label convention) and the run's options.

Sources, lowest to highest precedence: built-in defaults, values inferred from the data, ``corpuscle.toml`` in the
working directory (or ``[tool.corpuscle]`` in ``pyproject.toml``), then command-line flags.  A ``[paths."GLOB"]``
table in the file gives different facts to the shards whose path matches it.  Every value remembers where it came
from, and inferred values carry the evidence, so the report can say "inferred" and why.
"""
from __future__ import annotations

import dataclasses
import fnmatch
import os
import tomllib
from dataclasses import dataclass, field

from corpuscle.errors import SettingsError
from corpuscle.findings import DEFAULT_INSTANCE_CAP, Level

LABEL_CONVENTIONS = ("shifted", "aligned")
SEPARATORS = ("eos-after", "bos-before", "both")
FAIL_AT = ("error", "warning", "note", "never")
#: Levels a rule can be set to (``[rule.<id>] level``, ``[paths."GLOB".rule.<id>] level``, ``--level RULE=LEVEL``).
RULE_LEVELS = ("error", "warning", "note", "off")

#: Shard facts: may differ per path and may be inferred.
FACTS = ("text_column", "tokens_column", "labels_column", "mask_column", "positions_column", "eos_id", "bos_id",
         "pad_id", "vocab_size", "seq_len", "labels", "ignore_index", "separator", "tokenizer",
         "doc_lengths_column", "cu_seqlens_column")
#: Run options: one value for the whole scan.
OPTIONS = ("only", "skip", "fail_at", "instance_cap", "rule", "html", "levels", "suppress", "eval")




@dataclass
class Settings:
    text_column: str = "text"
    tokens_column: str = "input_ids"
    labels_column: str = "labels"
    mask_column: str = "attention_mask"
    positions_column: str = "position_ids"
    eos_id: int | None = None
    bos_id: int | None = None
    pad_id: int | None = None
    vocab_size: int | None = None
    seq_len: int | None = None
    labels: str | None = None
    ignore_index: int = -100  # common practice: PyTorch's cross-entropy ignore_index default
    separator: str = "eos-after"
    tokenizer: str | None = None
    doc_lengths_column: str = "doc_lengths"  # per-row lengths of the documents packed in the row
    cu_seqlens_column: str = "cu_seqlens"  # per-row cumulative document offsets, 0 ... the row's real length
    only: tuple[str, ...] = ()
    skip: tuple[str, ...] = ()
    fail_at: str = "error"
    instance_cap: int = DEFAULT_INSTANCE_CAP
    rule: dict = field(default_factory=dict)  # per-rule options: {"near-duplicate": {"threshold": 0.8}}
    html: str | None = None  # write the HTML report here (as --html FILE)
    levels: dict = field(default_factory=dict)  # rule id -> level from --level (over [rule.<id>] level)
    suppress: tuple = ()  # [[suppress]] entries: {"rule", "path", "kind" (optional), "justification"}
    path_levels: dict = field(default_factory=dict, repr=False)  # GLOB -> {rule id: level}, [paths."GLOB".rule.<id>]
    eval: tuple[str, ...] = ()  # evaluation sets compared with the training data (rule eval-overlap)
    path_tables: dict = field(default_factory=dict, repr=False)
    origin: dict = field(default_factory=dict, repr=False)  # key -> "default" | "inferred" | "config" | "flag"
    evidence: dict = field(default_factory=dict, repr=False)  # key -> why an inferred value was chosen
    undecided: dict = field(default_factory=dict, repr=False)  # key -> why the data did not settle it

    def __post_init__(self):
        self.validate()

    # -- construction -------------------------------------------------------------------------------------
    def validate(self) -> None:
        for key in ("text_column", "tokens_column", "labels_column", "mask_column", "positions_column",
                    "doc_lengths_column", "cu_seqlens_column"):
            if not isinstance(getattr(self, key), str) or not getattr(self, key):
                raise SettingsError(f"{key} must be a column name (a string), got {getattr(self, key)!r}")
        if not isinstance(self.ignore_index, int) or isinstance(self.ignore_index, bool):
            raise SettingsError(f"ignore_index must be an integer label value, got {self.ignore_index!r}")
        if self.tokenizer is not None and not isinstance(self.tokenizer, str):
            raise SettingsError(f"tokenizer must be the path of a tokenizer JSON file, got {self.tokenizer!r}")
        if self.tokenizer is not None:
            from corpuscle.kernels.tokenize import (
                check_tokenizer,  # local: the tokenizers library is an optional dependency
            )

            check_tokenizer(self.tokenizer)  # library missing, file missing or unreadable: a usage error
        if not all(isinstance(name, str) for name in (*self.only, *self.skip)):
            raise SettingsError("only and skip take rule ids, e.g. only = [\"label-alignment\"]")
        for key in ("eos_id", "bos_id", "pad_id"):
            value = getattr(self, key)
            if value is not None and (not isinstance(value, int) or isinstance(value, bool)):
                raise SettingsError(f"{key} must be an integer token id, got {value!r}")
        for key in ("vocab_size", "seq_len"):
            value = getattr(self, key)
            if value is not None and (not isinstance(value, int) or isinstance(value, bool) or value < 1):
                raise SettingsError(f"{key} must be a positive integer, got {value!r}")
        if self.labels is not None and self.labels not in LABEL_CONVENTIONS:
            raise SettingsError(f"labels must be one of {', '.join(LABEL_CONVENTIONS)}, got {self.labels!r}")
        if self.separator not in SEPARATORS:
            raise SettingsError(f"separator must be one of {', '.join(SEPARATORS)}, got {self.separator!r}")
        if self.fail_at not in FAIL_AT:
            raise SettingsError(f"fail_at must be one of {', '.join(FAIL_AT)}, got {self.fail_at!r}")
        if not isinstance(self.instance_cap, int) or isinstance(self.instance_cap, bool) or self.instance_cap < 0:
            raise SettingsError(f"instance_cap must be a whole number >= 0, got {self.instance_cap!r}")
        if self.html is not None and (not isinstance(self.html, str) or not self.html):
            raise SettingsError(f"html must be the path of the HTML report to write, got {self.html!r}")
        if isinstance(self.eval, (list, str)):  # eval = "qa.jsonl" or a list, from Python or a settings file
            self.eval = (self.eval,) if isinstance(self.eval, str) else tuple(self.eval)
        _check_eval(self.eval)
        if not isinstance(self.rule, dict) or not all(isinstance(v, dict) for v in self.rule.values()):
            raise SettingsError("rule options go in tables, e.g. [rule.near-duplicate] threshold = 0.8")
        _validate_gate(self)

    def source(self, key: str) -> str:
        return self.origin.get(key, "default")

    def with_values(self, values: dict, origin: str) -> "Settings":
        """A copy with ``values`` applied (unknown keys rejected), each marked as coming from ``origin``."""
        unknown = set(values) - set(FACTS) - set(OPTIONS) - {"paths"}
        if unknown:
            raise SettingsError(f"unknown setting(s) {', '.join(sorted(unknown))}: known are "
                                f"{', '.join(FACTS + OPTIONS)}")
        values = dict(values)
        tables = dict(self.path_tables)
        paths, path_levels = split_path_levels(values.pop("paths", {}) or {}, self.path_levels)
        tables.update(_check_path_tables(paths))
        for key in ("only", "skip"):
            if key in values and isinstance(values[key], str):
                values[key] = tuple(v.strip() for v in values[key].split(",") if v.strip())
            elif key in values:
                if not isinstance(values[key], (list, tuple)):
                    raise SettingsError(f"{key} takes rule ids, e.g. {key} = [\"label-alignment\"], got {values[key]!r}")
                values[key] = tuple(values[key])
        new = dataclasses.replace(self, **values, path_tables=tables, path_levels=path_levels,
                                  origin=dict(self.origin), evidence=dict(self.evidence))
        for key in values:
            new.origin[key] = origin
            new.evidence.pop(key, None)
        return new

    def for_path(self, path: str) -> "Settings":
        """The facts for one shard: the file's ``[paths."GLOB"]`` tables that match its path, in file order."""
        out = self
        # The path as found, normalised ("./data/x" is "data/x"), relative to the working directory and absolute.
        forms = {os.path.normpath(path), os.path.relpath(path), os.path.abspath(path)}
        forms = {form.replace(os.sep, "/") for form in forms}
        for pattern, values in self.path_tables.items():
            values = {k: v for k, v in values.items() if self.origin.get(k) != "flag"}  # a flag beats the file
            prefix = pattern.rstrip("/") + "/"
            if any(fnmatch.fnmatch(norm, pattern) or fnmatch.fnmatch(norm, prefix + "*") or norm.startswith(prefix)
                   for norm in forms):
                out = out.with_values(values, "config")
        return out

    def options_for(self, rule_id: str) -> dict:
        return {k: v for k, v in self.rule.get(rule_id, {}).items() if k != "level"}  # level: see rule_level

    def infer(self, key: str, value, why: str) -> None:
        """Fill an unset fact from the data (never overrides a config or flag value)."""
        if getattr(self, key) is None and value is not None:
            setattr(self, key, value)
            self.origin[key] = "inferred"
            self.evidence[key] = why

    @property
    def fail_level(self) -> Level | None:
        return None if self.fail_at == "never" else Level.parse(self.fail_at)


def _check_eval(paths) -> None:
    """Evaluation sets must be existing files (a usage error otherwise, before any shard is read)."""
    if not isinstance(paths, tuple) or not all(isinstance(p, str) and p for p in paths):
        raise SettingsError(f'eval takes paths of evaluation sets, e.g. eval = ["eval/qa.jsonl"], got {paths!r}')
    for path in paths:
        if "://" not in path and not os.path.isfile(path):
            raise SettingsError(f"evaluation set {path} does not exist: give a JSON Lines, Parquet or Arrow file "
                                "with one item per record (--eval FILE)")


def _check_path_tables(tables) -> dict:
    """Validate ``[paths."GLOB"]`` tables when the file is read, not when the first matching shard is met."""
    if not isinstance(tables, dict) or not all(isinstance(v, dict) for v in tables.values()):
        raise SettingsError('per-path facts go in tables, e.g. [paths."data/web/*"] eos_id = 2')
    for pattern, values in tables.items():
        bad = set(values) - set(FACTS)
        if bad:
            raise SettingsError(f"[paths.{pattern!r}] may only set shard facts ({', '.join(FACTS)}), "
                                f"not {', '.join(sorted(bad))}")
        try:
            Settings(**values)
        except (SettingsError, TypeError) as exc:
            raise SettingsError(f"[paths.{pattern!r}]: {exc}") from None
    return tables


def load_config(path: str | None = None, cwd: str = ".") -> tuple[dict, str | None]:
    """Read the settings file: ``path`` if given, else ``corpuscle.toml`` or ``[tool.corpuscle]`` in the cwd."""
    candidates = [path] if path else [os.path.join(cwd, "corpuscle.toml"), os.path.join(cwd, "pyproject.toml")]
    for candidate in candidates:
        if not os.path.exists(candidate):
            if path:
                raise SettingsError(f"config file {path} does not exist")
            continue
        try:
            with open(candidate, "rb") as fh:
                data = tomllib.load(fh)
        except (OSError, tomllib.TOMLDecodeError) as exc:
            raise SettingsError(f"cannot read config file {candidate}: {exc}") from None
        if os.path.basename(candidate) == "pyproject.toml" and not path:
            data = data.get("tool", {}).get("corpuscle")
            if data is None:
                continue
        elif os.path.basename(candidate) == "pyproject.toml":
            data = data.get("tool", {}).get("corpuscle", {})
        return data, candidate
    return {}, None


def build(config: dict | None = None, flags: dict | None = None) -> Settings:
    """Defaults < config file < flags (inferred values fill what is still unset, per shard, later)."""
    settings = Settings()
    if config:
        settings = settings.with_values(config, "config")
    if flags:
        settings = settings.with_values({k: v for k, v in flags.items() if v is not None}, "flag")
    return settings


def load_settings(config: str | None = None, cwd: str = ".", **facts) -> Settings:
    """The settings the command line would use: the settings file (``config``, else ``corpuscle.toml`` or
    ``[tool.corpuscle]`` in ``pyproject.toml`` under ``cwd``), then ``facts`` given as keyword arguments (the
    flags), e.g. ``load_settings(eos_id=2, vocab_size=32000)``."""
    data, _ = load_config(config, cwd)
    return build(data, facts)


# -- the CI gate: rule levels and suppressions ---------------------------------------------------------------


def split_path_levels(tables, known: dict | None = None) -> tuple[dict, dict]:
    """``[paths."GLOB"]`` tables without their ``rule`` sub-tables, and the levels those give:
    ``(tables of facts, {GLOB: {rule id: level}})`` (``known``: levels of earlier sources, kept under new ones)."""
    levels = {pattern: dict(by_rule) for pattern, by_rule in (known or {}).items()}
    if not isinstance(tables, dict):
        return tables, levels  # _check_path_tables says what is wrong
    facts = {}
    for pattern, values in tables.items():
        if not isinstance(values, dict) or "rule" not in values:
            facts[pattern] = values
            continue
        values = dict(values)
        per_rule = values.pop("rule")
        if not isinstance(per_rule, dict) or not all(isinstance(v, dict) for v in per_rule.values()):
            raise SettingsError(f'per-path rule levels go in tables, e.g. [paths."{pattern}".rule.exact-duplicate] '
                                'level = "off"')
        for rule_id, options in per_rule.items():
            if set(options) != {"level"}:
                raise SettingsError(f'[paths."{pattern}".rule.{rule_id}] may only set level (error, warning, note '
                                    f'or off), not {", ".join(sorted(set(options) - {"level"})) or "nothing"}')
            _check_level(options["level"], f'[paths."{pattern}".rule.{rule_id}] level')
            levels.setdefault(pattern, {})[rule_id] = options["level"]
        facts[pattern] = values
    return facts, levels


def _check_level(value, where: str) -> None:
    if value not in RULE_LEVELS:
        raise SettingsError(f"{where} must be one of {', '.join(RULE_LEVELS)}, got {value!r}")


SUPPRESS_KEYS = ("rule", "path", "kind", "justification")


def _validate_gate(settings: Settings) -> None:
    """Check rule levels and ``[[suppress]]`` entries (rule ids are checked against the registry when the rules
    are selected); entries become a tuple of dicts."""
    for rule_id, options in settings.rule.items():
        if "level" in options:
            _check_level(options["level"], f"[rule.{rule_id}] level")
    if not isinstance(settings.levels, dict):
        raise SettingsError("levels map rule ids to levels, e.g. --level exact-duplicate=error")
    for rule_id, level in settings.levels.items():
        _check_level(level, f"the level of {rule_id}")
    entries = settings.suppress
    if isinstance(entries, dict):
        entries = [entries]
    if not isinstance(entries, (list, tuple)) or not all(isinstance(e, dict) for e in entries):
        raise SettingsError('suppressions go in [[suppress]] tables with rule, path and justification, e.g. '
                            '[[suppress]] rule = "exact-duplicate" path = "mirror/*" justification = "..."')
    for number, entry in enumerate(entries, 1):
        where = f"[[suppress]] entry {number}"
        unknown = set(entry) - set(SUPPRESS_KEYS)
        if unknown:
            raise SettingsError(f"{where}: unknown key(s) {', '.join(sorted(unknown))} (known: "
                                f"{', '.join(SUPPRESS_KEYS)})")
        for key in ("rule", "path", "justification"):
            if not isinstance(entry.get(key), str) or not entry[key].strip():
                what = "a reason, in words" if key == "justification" else "a string"
                raise SettingsError(f"{where} needs {key} = {what}: every suppression says why it is accepted")
        if "kind" in entry and (not isinstance(entry["kind"], str) or not entry["kind"]):
            raise SettingsError(f"{where}: kind must be a finding kind (a string, globs allowed), got "
                                f"{entry['kind']!r}")
    settings.suppress = tuple(dict(e) for e in entries)


def path_forms(path: str) -> set[str]:
    """The forms a shard path is matched in (as ``Settings.for_path`` does): as found, normalised, relative to the
    working directory and absolute, with '/' separators."""
    forms = {path, os.path.normpath(path), os.path.relpath(path), os.path.abspath(path)} if "://" not in path \
        else {path}
    return {form.replace(os.sep, "/") for form in forms}


def path_matches(pattern: str, path: str) -> bool:
    """Whether a ``[paths]`` or ``[[suppress]]`` glob matches a shard path: the glob itself, or a folder and
    everything under it."""
    prefix = pattern.rstrip("/") + "/"
    return any(fnmatch.fnmatch(norm, pattern) or fnmatch.fnmatch(norm, prefix + "*") or norm.startswith(prefix)
               for norm in path_forms(path))


def rule_level(settings: Settings, rule_id: str, path: str | None = None) -> tuple[str | None, str]:
    """The level set for ``rule_id`` on the shard at ``path`` and where it was set:
    ``(level or None when none is set, source)``.  Precedence, lowest to highest: ``[rule.<id>] level``, the
    ``[paths."GLOB".rule.<id>]`` tables that match (in file order), ``--level``."""
    level, source = None, "default"
    configured = settings.rule.get(rule_id, {}).get("level")
    if configured is not None:
        level, source = configured, f"[rule.{rule_id}]"
    if path is not None:
        for pattern, by_rule in settings.path_levels.items():
            if rule_id in by_rule and path_matches(pattern, path):
                level, source = by_rule[rule_id], f'[paths."{pattern}".rule.{rule_id}]'
    if rule_id in settings.levels:
        level, source = settings.levels[rule_id], "--level"
    return level, source


def rule_off(settings: Settings, rule_id: str) -> bool:
    """Whether the rule is off for every shard (``level = "off"`` in ``[rule.<id>]`` or ``--level``, and no path
    table turns it back on): it is then not run at all."""
    level, _ = rule_level(settings, rule_id)
    return level == "off" and not any(by_rule.get(rule_id, "off") != "off"
                                      for by_rule in settings.path_levels.values())


def level_rule_ids(settings: Settings) -> set[str]:
    """Every rule id a level or a suppression names (checked against the registry)."""
    ids = {rule_id for rule_id, options in settings.rule.items() if "level" in options}
    ids |= set(settings.levels)
    for by_rule in settings.path_levels.values():
        ids |= set(by_rule)
    ids |= {entry["rule"] for entry in settings.suppress}
    return ids
