"""Command line: ``corpuscle scan``, ``corpuscle rules``, ``corpuscle explain``.  Thin: parse options, call the
engine, hand the report to the reporters.  Usage problems exit 2 with a message that says what to do."""
from __future__ import annotations

import contextlib
import os
import shutil
import signal
import sys
import textwrap
import threading

import click
from corpuscle.engine.progress import TerminalProgress
from corpuscle.engine.sampling import Sample
from corpuscle.engine.scan import run, select_rules
from corpuscle.gate import BaselineError, load_baseline
from corpuscle.io.outputs import OutputProblem, check_outputs, check_work_folders
from corpuscle.io.sources import NoShardsFound, discover
from corpuscle.report import droplist, printable, sarif, text, write_atomic
from corpuscle.report import html as html_report
from corpuscle.report import json as json_report
from corpuscle.settings import FAIL_AT, LABEL_CONVENTIONS, RULE_LEVELS, SEPARATORS, SettingsError, build, load_config
from corpuscle.version import __version__


class UsageProblem(click.ClickException):
    """A mistake in how corpuscle was called or configured: exit status 2."""

    exit_code = 2


#: Exit status after SIGINT (Ctrl-C) and SIGTERM: 128 + the signal number, as shells report a signal's end.
EXIT_SIGINT, EXIT_SIGTERM = 128 + signal.SIGINT, 128 + signal.SIGTERM


class Interrupted(BaseException):
    """Raised in the main thread when SIGTERM arrives (SIGINT raises KeyboardInterrupt): unwinds the scan so that
    the pool stops and temporary files go, then the command exits ``128 + signal``.  A BaseException, so that the
    guards that keep one rule's failure from stopping the others do not catch it."""

    def __init__(self, signum: int):
        super().__init__(signum)
        self.signum = signum


@contextlib.contextmanager
def _signals_stop_the_scan():
    """SIGTERM raises :class:`Interrupted` in the main thread while the block runs (only there can Python handle
    signals; elsewhere, e.g. in a test thread, nothing changes)."""
    if threading.current_thread() is not threading.main_thread():
        yield
        return

    def stop(signum, frame):
        raise Interrupted(signum)

    before = signal.signal(signal.SIGTERM, stop)
    try:
        yield
    finally:
        signal.signal(signal.SIGTERM, before)


def _remove_spill_folders(rules) -> None:
    """Remove what the rules keep on disk during a scan (the MinHash spill folder), after an interrupt."""
    for rule in rules:
        folder = getattr(rule, "spill_folder", None)
        if isinstance(folder, str):
            shutil.rmtree(folder, ignore_errors=True)


def _registry():
    from corpuscle.engine.registry import PluginError, registry

    try:
        return registry()
    except PluginError as exc:
        raise UsageProblem(str(exc)) from None


def _progress(quiet: bool):
    """A progress bar on stderr when stderr is a terminal and --quiet is not given; else None (nothing shown)."""
    if quiet or not sys.stderr.isatty():
        return None
    return TerminalProgress(sys.stderr)


@contextlib.contextmanager
def _executor(address: str | None, jobs: int | None):
    """The executor of --cluster, connected (and closed at the end), or None for the local process pool."""
    if address is None:
        yield None
        return
    from corpuscle.engine.executors import ClusterUnavailable, DaskExecutor

    try:
        executor = DaskExecutor(address, jobs).__enter__()
    except (ClusterUnavailable, ValueError) as exc:
        raise UsageProblem(str(exc)) from None
    try:
        yield executor
    finally:
        executor.close()


@click.group(context_settings={"help_option_names": ["-h", "--help"], "max_content_width": 100})
@click.version_option(__version__, prog_name="corpuscle")
def main():
    """Lint language-model pretraining shards (JSON Lines, Parquet, Arrow IPC) before they cost GPU time."""


#: True when corpuscle runs as a program (the console script, ``python -m corpuscle``), not called in-process.
_AS_PROGRAM = False


def program() -> None:
    """The ``corpuscle`` command: :func:`main` as a program. Once a scan's reports are written, a late Ctrl-C ends
    the process the default way (status 130 as the shell reports it) instead of raising KeyboardInterrupt into the
    summary or into the interpreter's exit, where it would print "Aborted!" or a traceback."""
    global _AS_PROGRAM
    _AS_PROGRAM = True
    main()


@main.command()
@click.argument("paths", nargs=-1, required=True)
@click.option("--config", "config_path", type=click.Path(dir_okay=False), help="Settings file (default: corpuscle.toml or [tool.corpuscle] in pyproject.toml).")
@click.option("--eos-id", type=int, help="End-of-sequence token id.")
@click.option("--bos-id", type=int, help="Beginning-of-sequence token id.")
@click.option("--pad-id", type=int, help="Padding token id.")
@click.option("--vocab-size", type=click.IntRange(min=1), help="Token ids must lie in [0, N).")
@click.option("--seq-len", type=click.IntRange(min=1), help="Context window in tokens.")
@click.option("--labels", type=click.Choice(LABEL_CONVENTIONS), help="Label convention of the shards.")
@click.option("--tokenizer", type=click.Path(dir_okay=False), help="Tokenizer JSON file for counting tokens of text shards.")
# -- shard facts: separator convention, column names, ignore index (one block; see DESIGN.md section 3) ---------
@click.option("--separator", type=click.Choice(SEPARATORS),
              help="How documents are marked off: eos after each, bos before each, or both [default: eos-after, or "
                   "bos-before when inferred].")
@click.option("--tokens-column", help="Column of token ids [default: input_ids].")
@click.option("--labels-column", help="Column of labels [default: labels].")
@click.option("--mask-column", help="Column of the attention mask [default: attention_mask].")
@click.option("--positions-column", help="Column of position ids [default: position_ids].")
@click.option("--text-column", help="Column of raw text [default: text].")
@click.option("--doc-lengths-column", help="Column of the lengths of the documents packed in each row [default: "
                                           "doc_lengths].")
@click.option("--cu-seqlens-column", help="Column of the cumulative document offsets of each row, 0 ... the row's "
                                          "real length [default: cu_seqlens].")
@click.option("--ignore-index", type=int, help="Label value that is not trained on [default: -100].")
@click.option("--eval", "eval", multiple=True, type=click.Path(dir_okay=False), metavar="FILE",
              callback=lambda ctx, param, value: tuple(value) or None,  # not given: the settings file's list
              help="Evaluation set to look for in the training data (repeatable): JSON Lines, Parquet or Arrow, one "
                   "item per record (rule eval-overlap).")
@click.option("--only", help="Run only these rules (comma-separated ids).")
@click.option("--skip", help="Do not run these rules (comma-separated ids).")
@click.option("--sarif", "sarif_path", type=click.Path(dir_okay=False), help="Write a SARIF 2.1.0 report here.")
@click.option("--json", "json_path", type=click.Path(dir_okay=False), help="Write a plain JSON report here.")
@click.option("--html", "html_path", type=click.Path(dir_okay=False),
              help="Write a self-contained HTML report with plots here (no network needed to open it).")
@click.option("--drop-list", "drop_list_path", type=click.Path(dir_okay=False),
              help="Write the copies to drop here, one JSON line each (uri, row, offset, length, the cluster, the "
                   "copy kept and why): every member of a duplicate cluster but the one kept (keep, prefer and "
                   "protect under [rule.exact-duplicate] and [rule.near-duplicate]).")
@click.option("--fail-at", type=click.Choice(FAIL_AT), help="Exit 1 when a finding is at or above this level [default: error].")
@click.option("--jobs", type=click.IntRange(min=1), help=("Cores to scan with: shards, and parts of large shards, are scanned by this many processes, each "
                    "decoding with one Arrow thread [default: number of cores]."))
@click.option("--cluster", metavar="ADDRESS",
              help="Scan on a Dask cluster: the address of its scheduler (e.g. tcp://scheduler.example:8786), or 'local' to "
                   "start one on this machine with --jobs worker processes. The workers must read the shards at the "
                   "same paths (a shared file system, or s3://, gs://, hdfs:// URIs). Needs "
                   "pip install 'corpuscle[cluster]'.")
@click.option("--sample", "sample_fraction", type=click.FloatRange(0, 1, min_open=True), metavar="FRACTION",
              help="Scan a reproducible random subset: each row group, record batch or block of JSON lines is read "
                   "with this probability. Finding counts are then as observed in the sample; the report gives "
                   "estimates with 95% intervals.")
@click.option("--seed", "sample_seed", type=click.IntRange(min=0), default=0, show_default=True,
              help="Seed of --sample (the same seed picks the same units in every run and for any --jobs).")
@click.option("--level", "levels", multiple=True, metavar="RULE=LEVEL",
              help=f"Set a rule's level for this run ({', '.join(RULE_LEVELS)}; off does not run it); repeatable. "
                   "Over [rule.<id>] level and [paths.\"GLOB\".rule.<id>] level in the settings file.")
@click.option("--baseline", "baseline_path", type=click.Path(dir_okay=False), metavar="OLD.sarif",
              help="Compare with the SARIF report of an earlier scan: each result is marked new, unchanged, updated "
                   "or absent, and only new and updated results count for the exit status.")
@click.option("--stats", is_flag=True, help="Add the corpus figures and the token budget to the summary (always in "
                                            "the SARIF and JSON reports).")
@click.option("--format", "summary_format", type=click.Choice(["compact", "long"]), default="compact",
              show_default=True, help="The summary: one line per finding and its fix, or every finding in full prose.")
@click.option("--quiet", "-q", is_flag=True, help="No progress on stderr.")
def scan(paths, config_path, sarif_path, json_path, html_path, drop_list_path, jobs, sample_fraction, sample_seed,
         quiet, levels, baseline_path, stats, summary_format, **flags):
    """Scan shards (files, folders, globs) and report what would hurt training."""
    cluster = flags.pop("cluster")  # how to run, not a setting
    try:
        flags["levels"] = _levels(levels) or None
        config, _ = load_config(config_path)
        settings = build(config, flags)
        rules = select_rules(settings, _registry())
        shards = discover(list(paths))
        html_path = html_path or settings.html
        outputs = {"--sarif": sarif_path, "--json": json_path, "--html": html_path, "--drop-list": drop_list_path}
        check_outputs(outputs, list(paths), shards)
        check_work_folders(rules)
        baseline = load_baseline(baseline_path) if baseline_path else None
    except (SettingsError, NoShardsFound, BaselineError, OutputProblem) as exc:
        raise UsageProblem(str(exc)) from None
    except KeyboardInterrupt:  # Ctrl-C while the settings are read or the shards are listed: nothing to clean
        click.echo("interrupted (SIGINT) before scanning: no report written", err=True)
        sys.exit(EXIT_SIGINT)
    sample = Sample(sample_fraction, sample_seed) if sample_fraction is not None else None
    try:
        with _signals_stop_the_scan():
            try:
                with _executor(cluster, jobs) as executor:
                    report = run(shards, settings, rules, jobs=jobs or os.cpu_count() or 1,
                                 progress=_progress(quiet), sample=sample, executor=executor)
                if baseline is not None:
                    report.compare(baseline)
            except (UsageProblem, KeyboardInterrupt, Interrupted):
                raise
            except Exception as exc:  # noqa: BLE001 - the engine failed: say so, exit 3, no traceback
                report = _failed_report(shards, settings, rules, exc)
            for path, module in ((sarif_path, sarif), (json_path, json_report), (html_path, html_report),
                                 (drop_list_path, droplist)):
                if path:
                    try:
                        data = module.render(report)
                    except Exception as exc:  # noqa: BLE001 - a report must still replace an older one: exit 3
                        report = _failed_report(shards, settings, rules, exc)
                        data = module.render(report)
                    try:
                        write_atomic(path, data)
                    except OSError as exc:
                        raise UsageProblem(f"cannot write {path}: {exc.strerror or exc}") from None
    except KeyboardInterrupt:
        _remove_spill_folders(rules)
        click.echo("interrupted (SIGINT): no report written; older reports were left as they were", err=True)
        sys.exit(EXIT_SIGINT)
    except Interrupted as stop:
        _remove_spill_folders(rules)
        click.echo(f"interrupted ({signal.Signals(stop.signum).name}): no report written; older reports were left "
                   "as they were", err=True)
        sys.exit(128 + stop.signum)
    if _AS_PROGRAM:  # the reports are written: a Ctrl-C from here on just ends the process (see program)
        signal.signal(signal.SIGINT, signal.SIG_DFL)
    if drop_list_path and droplist.NAME not in report.outputs:
        click.echo(f"note: the drop list {drop_list_path} is empty: {_why_no_output(droplist.NAME, rules)}", err=True)
    click.echo(printable(text.render(report, stats=stats, long=summary_format == "long")), nl=False)
    sys.exit(report.exit_code)


def _levels(pairs) -> dict:
    """``--level RULE=LEVEL`` options as {rule id: level} (rule ids are checked with the rules)."""
    out = {}
    for pair in pairs:
        rule_id, sep, level = pair.partition("=")
        if not sep or not rule_id.strip() or level.strip() not in RULE_LEVELS:
            raise SettingsError(f"--level takes RULE=LEVEL with LEVEL one of {', '.join(RULE_LEVELS)}, e.g. "
                                f"--level exact-duplicate=error; got {pair!r}")
        out[rule_id.strip()] = level.strip()
    return out


def _failed_report(shards, settings, rules, exc: Exception):
    """The report of a scan the engine could not finish: no findings, the error as an internal note (SARIF
    ``executionSuccessful: false``, exit status 3), so that no older report at the output path looks current."""
    from corpuscle.engine.scan import Note, Report
    from corpuscle.findings import Level

    note = Note(Level.error, f"the scan stopped after an internal error ({type(exc).__name__}: {exc}); no "
                             "findings were reported", internal=True)
    metrics = {"shards": len(shards), "rows": 0, "tokens": 0, "bytes": sum(max(s.length, 0) for s in shards),
               "seconds": 0.0}
    return Report([], list(shards), list(rules), metrics, [note], settings)


def _why_no_output(name: str, rules) -> str:
    """Why no rule gave the output ``name``: none that makes it was selected, or the ones selected failed."""
    makers = [rule_id for rule_id, cls in _registry().items() if name in cls.outputs]
    ran = [rule.id for rule in rules if name in rule.outputs]
    if ran:
        return f"{', '.join(ran)} failed while reporting (see the notes in the summary)"
    if not makers:
        return f"no rule makes a {name}"
    return f"only {', '.join(makers)} make(s) one, and none of them was selected (see --only / --skip)"


@main.command("rules")
def list_rules():
    """List the rules: id, default level, what each checks."""
    available = _registry()
    width = max(len(i) for i in available)
    for rule_id, cls in available.items():
        click.echo(f"{rule_id.ljust(width)}  {cls.level.name.ljust(7)}  {cls.summary}")


@main.command()
@click.argument("rule_id")
def explain(rule_id):
    """What a rule checks, why it matters, how to fix it, and its options."""
    available = _registry()
    if rule_id not in available:
        raise UsageProblem(f"unknown rule {rule_id!r}; `corpuscle rules` lists them")
    rule = available[rule_id]()
    click.echo(f"{rule.id} (default level: {rule.level.name})\n")
    click.echo(_fill(rule.summary, "") + "\n")
    click.echo("What it checks and why it matters")
    click.echo(_fill(rule.description, "  ") + "\n")
    click.echo("How to fix")
    click.echo(_fill(rule.help, "  "))
    needs = ", ".join(f"{k} ({v})" for k, v in rule.needs.items()) or "none"
    click.echo(f"\nColumns needed{' (any one of them)' if rule.needs_any else ''}: {needs}")
    if rule.requires:
        click.echo(f"Settings needed: {', '.join(rule.requires)}")
    if rule.options:
        click.echo(f"Options ([rule.{rule.id}] in corpuscle.toml):")
        for name, default in rule.options.items():
            click.echo(f"  {name} = {default!r}")


def _fill(text: str, indent: str) -> str:
    """Wrap at 100 columns without breaking a word or at its hyphens (rule ids and kinds stay copyable)."""
    return textwrap.fill(text, 100, initial_indent=indent, subsequent_indent=indent, break_long_words=False,
                         break_on_hyphens=False)


#: Options of ``scan`` that ``repair`` takes as they are: the shard facts.
_FACT_OPTIONS = ("config_path", "eos_id", "bos_id", "pad_id", "vocab_size", "seq_len", "labels", "separator",
                 "tokenizer", "ignore_index", "tokens_column", "labels_column", "mask_column", "positions_column",
                 "text_column", "doc_lengths_column", "cu_seqlens_column")


@main.command()
@click.argument("paths", nargs=-1, required=True)
@click.option("--out", "out", required=True, type=click.Path(file_okay=False),
              help="Folder for the repaired shards (same relative names) and repair.json; never an input or "
                   "inside one.")
@click.option("--fix", "fix", metavar="RULE,...",
              help="Fix only these rules' findings (comma-separated ids) [default: every fixable one found].")
@click.option("--repack", type=click.Choice(["best-fit", "chunk"]),
              help="Lay the documents into new windows of seq_len: best-fit decreasing, or concatenate and chunk.")
@click.option("--dry-run", is_flag=True, help="Print what would change, per shard and fix; write nothing.")
@click.option("--jobs", type=click.IntRange(min=1), help="Shards repaired at once [default: number of cores].")
def repair(paths, out, fix, repack, dry_run, jobs, **flags):
    """Write corrected copies of shards under --out, then scan them again: exit 0 clean, 1 still found, 3 incomplete."""
    from corpuscle.repair import RepairUsage, parse_fixes, summary
    from corpuscle.repair import repair as run_repair

    config_path = flags.pop("config_path", None)
    try:
        fixes = parse_fixes(fix)
        config, _ = load_config(config_path)
        settings = build(config, flags)
        result = run_repair(list(paths), out, settings, fixes, repack, dry_run, jobs or os.cpu_count() or 1)
    except (SettingsError, NoShardsFound, RepairUsage) as exc:
        raise UsageProblem(str(exc)) from None
    except OSError as exc:
        click.echo(f"repair could not complete: {exc.strerror or exc} ({getattr(exc, 'filename', '') or out})",
                   err=True)
        sys.exit(3)
    except Exception as exc:  # noqa: BLE001 - an internal error: say so in one line, exit 3 (incomplete)
        click.echo(f"repair could not complete (internal error: {type(exc).__name__}: {exc}); the inputs are "
                   "untouched, and a repaired shard is only ever renamed into place once it is complete", err=True)
        sys.exit(3)
    click.echo(summary(result), nl=False)
    sys.exit(result.exit_code)


repair.params.extend(param for param in scan.params if param.name in _FACT_OPTIONS)
