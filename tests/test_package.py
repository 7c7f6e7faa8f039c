"""The package as a user installs it: one import package named corpuscle, in layers without import cycles, that
files named like its folders in the working directory cannot shadow, and that a third-party rule plugs into.

References: the wheel format (PEP 427: a zip archive whose top-level entries are the import packages and the
``.dist-info`` folder) read with the stdlib ``zipfile``; entry points (the ``entry_points.txt`` file of a
``.dist-info`` folder, read by the stdlib ``importlib.metadata``); Python's ``ast`` module for the import graph.
"""
from __future__ import annotations

import ast
import json
import os
import re
import subprocess
import sys
import zipfile
from pathlib import Path

import pytest

from tests.shards import REPO, write

PACKAGE_DIRS = {"corpuscle": REPO / "lint", "corpuscle.rules": REPO / "rules"}
README = (REPO / "README.md").read_text()


def modules() -> dict[str, Path]:
    """Every module of the package by its dotted name, from the folders the package is built from."""
    out = {}
    for package, folder in PACKAGE_DIRS.items():
        for path in folder.rglob("*.py"):
            parts = path.relative_to(folder).with_suffix("").parts
            if package == "corpuscle" and parts[0] == "rules":
                continue
            name = ".".join((package, *parts))
            out[name.removesuffix(".__init__")] = path
    return out


def imports_of(path: Path, known: set[str]) -> set[str]:
    """The package's modules that ``path`` imports anywhere in it (function-level imports included)."""
    found = set()
    for node in ast.walk(ast.parse(path.read_text())):
        if isinstance(node, ast.Import):
            found |= {alias.name for alias in node.names if alias.name in known}
        elif isinstance(node, ast.ImportFrom) and node.module and node.level == 0:
            for alias in node.names:
                child = f"{node.module}.{alias.name}"
                found.add(child if child in known else node.module)
    return found & known


def test_the_package_has_no_import_cycle():
    mods = modules()
    graph = {name: imports_of(path, set(mods)) - {name} for name, path in mods.items()}
    # Depth-first search for a back edge (a cycle), reporting the first one found.
    state: dict[str, int] = {}
    stack: list[str] = []

    def visit(node):
        state[node] = 1
        stack.append(node)
        for nxt in sorted(graph[node]):
            if state.get(nxt) == 1:
                cycle = stack[stack.index(nxt):] + [nxt]
                pytest.fail("import cycle: " + " -> ".join(cycle))
            if nxt not in state:
                visit(nxt)
        stack.pop()
        state[node] = 2

    for name in sorted(graph):
        if name not in state:
            visit(name)
    assert len(graph) > 30  # the walk saw the whole package


def test_rule_modules_hold_rules_and_import_no_other_rule_module():
    mods = modules()
    rule_modules = {n for n in mods if n.startswith("corpuscle.rules.") and n != "corpuscle.rules.api"}
    assert len(rule_modules) >= 9
    for name in sorted(rule_modules):
        imported = imports_of(mods[name], set(mods))
        assert not imported & (rule_modules - {name}), f"{name} imports another rule module"
        assert re.search(r"^RULES = \[", mods[name].read_text(), re.M), f"{name} lists no rules"


def test_the_wheel_installs_one_top_level_package(tmp_path):
    subprocess.run([sys.executable, "-m", "pip", "wheel", "--no-deps", "-q", "-w",
                    str(tmp_path), str(REPO)], check=True, capture_output=True)
    (wheel,) = tmp_path.glob("corpuscle-*.whl")
    with zipfile.ZipFile(wheel) as archive:
        tops = {name.split("/", 1)[0] for name in archive.namelist()}
        names = set(archive.namelist())
    assert {t for t in tops if not t.endswith(".dist-info")} == {"corpuscle"}
    # every module of the source folders is in the wheel (a subpackage left out of pyproject.toml is not)
    expected = {"/".join(name.split(".")) + ("/__init__.py" if path.name == "__init__.py" else ".py")
                for name, path in modules().items()}
    assert expected - names == set()


# -- a plugin rule, as the README shows it, installed through the entry-point group ---------------------------

def plugin_source() -> str:
    """The plugin example of the README (the Python block under 'Writing a rule')."""
    section = README.split("### Writing a rule", 1)[1]
    return re.search(r"```python\n(.*?)```", section, re.S).group(1)


def install_plugin(site: Path) -> None:
    """Install the README's plugin into ``site`` the way pip would: the module and a .dist-info folder whose
    entry_points.txt announces the rule under the group ``corpuscle.rules``."""
    site.mkdir()
    (site / "long_rows.py").write_text(plugin_source())
    info = site / "long_rows-0.1.dist-info"
    info.mkdir()
    (info / "METADATA").write_text("Metadata-Version: 2.1\nName: long-rows\nVersion: 0.1\n")
    (info / "entry_points.txt").write_text("[corpuscle.rules]\nlong-rows = long_rows:LongRows\n")


def run_cli(*args, cwd: Path, site: Path | None = None) -> subprocess.CompletedProcess:
    env = dict(os.environ)
    if site is not None:
        env["PYTHONPATH"] = str(site)
    return subprocess.run([sys.executable, "-m", "corpuscle", *args], cwd=cwd, env=env, capture_output=True,
                          text=True, timeout=300)


def test_the_readme_plugin_runs_from_its_entry_point_with_two_jobs(tmp_path):
    install_plugin(tmp_path / "site")
    work = tmp_path / "work"
    work.mkdir()
    os.chdir(work)
    # 30 rows of 5 .. 34 tokens: the 19 rows of 16 tokens or more are over the limit of 15.
    rows = [list(range(10, 10 + n)) for n in range(5, 35)]
    write("a.parquet", {"input_ids": rows})
    (work / "corpuscle.toml").write_text("[rule.long-rows]\nlimit = 15\n")
    done = run_cli("scan", "a.parquet", "--only", "long-rows", "--jobs", "2", "--json", "r.json", cwd=work,
                   site=tmp_path / "site")
    assert done.returncode == 0, done.stderr
    (finding,) = json.loads((work / "r.json").read_text())["findings"]
    expected = [i for i, row in enumerate(rows) if len(row) > 15]
    assert finding["rule"] == "long-rows" and finding["count"] == len(expected) == 19
    assert [inst["row"] for inst in finding["instances"]] == expected
    assert {inst["offset"] for inst in finding["instances"]} == {15}


def test_files_named_like_the_folders_in_the_working_directory_change_nothing(tmp_path):
    work = tmp_path / "work"
    work.mkdir()
    os.chdir(work)
    write("a.parquet", {"input_ids": [[5, 6, 7, 2], [8, 9, 2], [4, 2]]})
    clean = run_cli("scan", "a.parquet", "--jobs", "2", "--eos-id", "2", cwd=work)
    for name in ("rules.py", "lint.py"):
        (work / name).write_text("raise ImportError('a local module that shadows a package name')\n")
    (work / "rules").mkdir()
    (work / "rules" / "__init__.py").write_text("registry = None\n")
    shadowed = run_cli("scan", "a.parquet", "--jobs", "2", "--eos-id", "2", cwd=work)
    assert (shadowed.returncode, shadowed.stderr) == (clean.returncode, clean.stderr) == (0, "")
    strip = re.compile(r"\d+\.\d+ ?s\b|seconds: \d+\.\d+")  # timings differ between runs
    assert strip.sub("", shadowed.stdout) == strip.sub("", clean.stdout)
    api = subprocess.run([sys.executable, "-c", "from corpuscle import scan, Settings, Rule, load_settings; "
                          "print(scan(['a.parquet'], load_settings(eos_id=2)).exit_code)"],
                         cwd=work, capture_output=True, text=True, timeout=120)
    assert (api.returncode, api.stdout.strip()) == (0, "0"), api.stderr
