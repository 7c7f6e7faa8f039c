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
import stat
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
#: Limits on one record, each a run option (a finding when a record exceeds one; that record is not scanned, the
#: rest is): they keep a scan's memory bounded whatever the input (see the README's memory bound).
LIMITS = {
    "max_record_bytes": 32 << 20,  # bytes of one record as decoded: a JSON line after decompression, a row's values
    "max_row_tokens": 1 << 22,  # values in one row of a list column (4,194,304 tokens)
    "max_keys": 256,  # distinct keys (columns) of a JSON Lines shard; later new keys are dropped
    "max_depth": 32,  # nesting depth of a JSON value; deeper values are dropped
}
#: Run options: one value for the whole scan.
OPTIONS = ("only", "skip", "fail_at", "instance_cap", "rule", "html", "levels", "suppress", "eval", *LIMITS)




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
    max_record_bytes: int = LIMITS["max_record_bytes"]
    max_row_tokens: int = LIMITS["max_row_tokens"]
    max_keys: int = LIMITS["max_keys"]
    max_depth: int = LIMITS["max_depth"]
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
        check_ranges(self)
        check_limits(self)

    def source(self, key: str) -> str:
        return self.origin.get(key, "default")

    def with_values(self, values: dict, origin: str) -> "Settings":
        """A copy with ``values`` applied (unknown keys rejected), each marked as coming from ``origin``."""
        if not isinstance(values, dict):
            raise SettingsError(f"settings must be a table of key = value pairs (e.g. eos_id = 2), got "
                                f"{type(values).__name__} {values!r:.40}")
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
        check_glob(pattern)
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
        data = read_config_file(candidate)
        if os.path.basename(candidate) == "pyproject.toml":
            data = tool_table(data, candidate)
            if data is None and not path:
                continue
            data = data or {}
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


# -- validation kept apart: ranges, limits, the config file itself ------------------------------------------------

#: Bounds that keep memory and time sane: a context window of 16,777,216 tokens, ids within int64, a vocabulary of
#: 2**31 ids (the int32 range tokenizers use), 10 million locations per finding.
MAX_SEQ_LEN = 1 << 24
MAX_VOCAB_SIZE = 1 << 31
INT64 = (-(1 << 63), (1 << 63) - 1)
MAX_INSTANCE_CAP = 10_000_000
#: A settings file larger than this is not read (a TOML file of settings is a few kilobytes).
MAX_CONFIG_BYTES = 1 << 20


def _whole(value) -> bool:
    return isinstance(value, int) and not isinstance(value, bool)


def check_ranges(settings: "Settings") -> None:
    """Upper (and lower) bounds of the numeric facts and options, checked once the types are known to be right."""
    if settings.seq_len is not None and settings.seq_len > MAX_SEQ_LEN:
        raise SettingsError(f"seq_len must be at most {MAX_SEQ_LEN:,} tokens, got {settings.seq_len:,}")
    if settings.vocab_size is not None and settings.vocab_size > MAX_VOCAB_SIZE:
        raise SettingsError(f"vocab_size must be at most {MAX_VOCAB_SIZE:,}, got {settings.vocab_size:,}")
    for key in ("eos_id", "bos_id", "pad_id", "ignore_index"):
        value = getattr(settings, key)
        if value is not None and not INT64[0] <= value <= INT64[1]:
            raise SettingsError(f"{key} must fit in a 64-bit integer, got {value}")
    if settings.instance_cap > MAX_INSTANCE_CAP:
        raise SettingsError(f"instance_cap must be at most {MAX_INSTANCE_CAP:,}, got {settings.instance_cap:,}")


#: Bounds of each limit: (least, most).
LIMIT_RANGES = {
    "max_record_bytes": (1 << 10, 1 << 30),
    "max_row_tokens": (1, 1 << 28),
    "max_keys": (1, 1 << 16),
    "max_depth": (1, 256),
}


def check_limits(settings: "Settings") -> None:
    for key, (least, most) in LIMIT_RANGES.items():
        value = getattr(settings, key)
        if not _whole(value) or not least <= value <= most:
            raise SettingsError(f"{key} must be a whole number from {least:,} to {most:,}, got {value!r} "
                                f"(default {LIMITS[key]:,})")


def glob_set_end(text: str, start: int) -> int:
    """The index of the ``]`` that closes the ``[...]`` set opening at ``text[start]``, or -1 when it never closes
    (then the ``[`` is a literal bracket); a ``]`` right after ``[`` or ``[!`` belongs to the set, as in fnmatch
    and glob."""
    j = start + 1
    if j < len(text) and text[j] == "!":
        j += 1
    if j < len(text) and text[j] == "]":
        j += 1
    return text.find("]", j)


def check_glob(pattern) -> None:
    """A ``[paths."GLOB"]`` pattern must be a non-empty string whose ``[`` sets are closed (fnmatch would read an
    unclosed ``[`` as a literal bracket and silently match nothing)."""
    if not isinstance(pattern, str) or not pattern:
        raise SettingsError(f"[paths] keys are glob patterns such as \"data/web/*\", got {pattern!r}")
    i = 0
    while i < len(pattern):
        if pattern[i] == "[":
            close = glob_set_end(pattern, i)
            if close < 0:
                raise SettingsError(f"[paths.{pattern!r}]: the '[' at character {i + 1} is never closed; write "
                                    "[[] for a literal bracket")
            i = close
        i += 1


def read_config_file(path: str) -> dict:
    """The TOML data of a settings file: a regular file (not a FIFO, a device or a folder) of at most
    :data:`MAX_CONFIG_BYTES`, read without blocking on anything else."""
    try:
        info = os.stat(path)
    except OSError as exc:
        raise SettingsError(f"cannot read config file {path}: {exc.strerror or exc}") from None
    if not stat.S_ISREG(info.st_mode):
        raise SettingsError(f"config file {path} is not a regular file (a folder, FIFO or device): give a TOML file")
    if info.st_size > MAX_CONFIG_BYTES:
        raise SettingsError(f"config file {path} is {info.st_size:,} bytes, more than a settings file needs "
                            f"(at most {MAX_CONFIG_BYTES:,}): check the path")
    try:
        with open(path, "rb") as fh:
            raw = fh.read(MAX_CONFIG_BYTES + 1)
        if len(raw) > MAX_CONFIG_BYTES:
            raise SettingsError(f"config file {path} is larger than {MAX_CONFIG_BYTES:,} bytes: check the path")
        return tomllib.loads(raw.decode("utf-8"))
    except UnicodeDecodeError as exc:
        raise SettingsError(f"cannot read config file {path}: not UTF-8 text (byte {exc.start})") from None
    except (OSError, tomllib.TOMLDecodeError) as exc:
        raise SettingsError(f"cannot read config file {path}: {str(exc).splitlines()[0] if str(exc) else exc}") \
            from None


def tool_table(data: dict, path: str) -> dict | None:
    """``[tool.corpuscle]`` of a pyproject.toml's data (None when there is none), checked to be a table."""
    tool = data.get("tool")
    if tool is None:
        return None
    if not isinstance(tool, dict):
        raise SettingsError(f"{path}: 'tool' must be a table ([tool.corpuscle]), got {type(tool).__name__}")
    table = tool.get("corpuscle")
    if table is not None and not isinstance(table, dict):
        raise SettingsError(f"{path}: [tool.corpuscle] must be a table of settings (e.g. eos_id = 2), got "
                            f"{type(table).__name__} {table!r:.40}")
    return table
