"""The house rules of the code base: one import namespace, imports that point one way,
one stage list, and a contributor guide whose map matches the tree."""

from __future__ import annotations

import ast
import re
import subprocess
import sys
import tomllib
import zipfile
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]
FOLDERS = ("pipeline", "schemas", "flows")


def _modules() -> dict[str, Path]:
    """Dotted ``takeup.*`` name -> source file, for every module of the three folders."""
    out = {}
    for folder in FOLDERS:
        for py in sorted((ROOT / folder).rglob("*.py")):
            rel = py.relative_to(ROOT).with_suffix("")
            parts = list(rel.parts)
            if parts[-1] == "__init__":
                parts = parts[:-1]
            out[".".join(["takeup", *parts])] = py
    return out


def _imports(path: Path) -> set[str]:
    """Every ``takeup.*`` module a file imports, at module level or inside functions."""
    found = set()
    for node in ast.walk(ast.parse(path.read_text())):
        if isinstance(node, ast.Import):
            found |= {a.name for a in node.names if a.name.startswith("takeup")}
        elif isinstance(node, ast.ImportFrom) and node.level == 0 and (node.module or "").startswith("takeup"):
            found.add(node.module)
            found |= {f"{node.module}.{a.name}" for a in node.names}
        elif isinstance(node, ast.ImportFrom) and node.level > 0:
            pytest.fail(f"{path.relative_to(ROOT)}: relative import; write the full takeup.… name")
    return found


def _layer(name: str) -> str:
    parts = name.split(".")
    if parts[1] in ("schemas", "flows"):
        return parts[1]
    if len(parts) == 2:
        return "pipeline"
    return parts[2]  # a sub-package (ingest, run, stats, outputs) or a module at the top (cli, warehouse, ...)


# what each layer may import (besides itself); anything else is a violation
ALLOWED = {
    "schemas": set(),
    "stats": {"schemas"},
    "errors": set(),
    "pseudonym": set(),
    "batch_activity": {"schemas", "errors"},
    "participant_state": {"schemas", "errors", "batch_activity"},
    "warehouse": {"schemas", "errors", "pseudonym", "participant_state", "batch_activity"},
    "ingest": {"schemas", "errors", "pseudonym", "warehouse", "participant_state", "batch_activity", "stats"},
    "run": {"schemas", "errors", "pseudonym", "warehouse", "participant_state", "batch_activity", "stats"},
    "outputs": {"schemas", "errors", "pseudonym", "warehouse", "participant_state", "batch_activity", "stats"},
    "demo": {"schemas", "errors", "pseudonym", "warehouse", "participant_state", "batch_activity", "stats", "ingest", "run", "outputs"},
    "flows": {"schemas", "errors", "pseudonym", "warehouse", "participant_state", "batch_activity", "stats", "ingest", "run", "outputs", "pipeline"},
    "cli": {"schemas", "errors", "pseudonym", "warehouse", "participant_state", "batch_activity", "stats", "ingest", "run", "outputs", "demo", "flows",
            "pipeline"},
    "pipeline": set(),
}


def test_imports_point_one_way():
    modules = _modules()
    problems = []
    for name, path in modules.items():
        mine = _layer(name)
        assert mine in ALLOWED, f"{name}: no layer rule for {mine!r}; add it to ALLOWED and the guide"
        for imported in _imports(path):
            target = next((m for m in sorted(modules, key=len, reverse=True)
                           if imported == m or imported.startswith(m + ".")), None)
            if target is None:
                continue  # a name imported from a module (takeup.x.y.func) resolves to its module above
            theirs = _layer(target)
            if theirs != mine and theirs not in ALLOWED[mine]:
                problems.append(f"{path.relative_to(ROOT)} ({mine}) imports {target} ({theirs})")
    assert not problems, "\n".join(problems)


def test_no_old_top_level_import_names():
    """Everything imports as takeup.…; no module, test or script uses the bare folder names."""
    pattern = re.compile(r"^\s*(from|import)\s+(pipeline|schemas|flows)\b", re.M)
    files = [*ROOT.glob("pipeline/**/*.py"), *ROOT.glob("schemas/**/*.py"), *ROOT.glob("flows/**/*.py"),
             *ROOT.glob("tests/**/*.py"), *ROOT.glob("benchmarks/**/*.py")]
    bad = [str(f.relative_to(ROOT)) for f in files if pattern.search(f.read_text())]
    assert not bad


def test_pyproject_lists_every_sub_package():
    conf = tomllib.loads((ROOT / "pyproject.toml").read_text())["tool"]["setuptools"]
    listed = set(conf["packages"])
    on_disk = {name for name, path in _modules().items() if path.name == "__init__.py"}
    assert listed == on_disk, f"missing from pyproject: {sorted(on_disk - listed)}; " \
                              f"listed but absent: {sorted(listed - on_disk)}"
    assert conf["package-dir"] == {f"takeup.{f}": f for f in FOLDERS}


def test_stage_list_is_defined_once():
    """The flow walks STAGES through compute_all; it names no stage function of its own."""
    from takeup.pipeline.run.stages import STAGES
    flow_src = (ROOT / "flows" / "monitor.py").read_text()
    for stage in STAGES:
        assert stage.function.__name__ not in flow_src, f"flows/monitor.py calls {stage.function.__name__} itself"
    assert "compute_all(" in flow_src and "STAGES" in flow_src
    assert [s.name for s in STAGES] == ["site_estimates", "adjusted", "pooling", "sequential", "precision",
                                       "trends", "alerts"]


def test_guide_map_matches_the_tree():
    guide = (ROOT / "DEVELOPERS.md").read_text()
    block = guide[guide.index("```\nschemas/"):]
    block = block[:block.index("```", 3)]
    mentioned = set(re.findall(r"\b([a-z_0-9]+\.py)\b", block))
    on_disk = {p.name for f in FOLDERS for p in (ROOT / f).rglob("*.py") if p.name != "__init__.py"}
    assert on_disk - mentioned == set(), f"modules missing from the guide's map: {sorted(on_disk - mentioned)}"
    known = on_disk | {p.name for p in (ROOT / "benchmarks").glob("*.py")}
    assert mentioned - known == set(), f"the guide's map names modules that do not exist: {sorted(mentioned - known)}"
    folders = {p.parent.name + "/" for f in FOLDERS for p in (ROOT / f).rglob("__init__.py")}
    for folder in folders:
        assert re.search(rf"^\s*{re.escape(folder)}", block, re.M), f"folder {folder} missing from the map"


def test_wheel_has_one_top_level_name(tmp_path):
    """Built as a user's `pip install .` builds it: the wheel's only top-level import name is `takeup`."""
    r = subprocess.run([sys.executable, "-m", "pip", "wheel", "--no-deps", "--no-build-isolation", "--quiet",
                        "-w", str(tmp_path), str(ROOT)], capture_output=True, text=True, timeout=300)
    assert r.returncode == 0, r.stderr[-2000:]
    wheel = next(tmp_path.glob("takeup-*.whl"))
    names = zipfile.ZipFile(wheel).namelist()
    tops = {n.split("/")[0] for n in names if not n.split("/")[0].endswith(".dist-info")}
    assert tops == {"takeup"}
    assert "takeup/__init__.py" not in names          # an implicit namespace package
    expected = {f"takeup/{p.relative_to(ROOT).as_posix()}" for f in FOLDERS for p in (ROOT / f).rglob("*.py")}
    assert expected - set(names) == set()
    entry = zipfile.ZipFile(wheel).read(next(n for n in names if n.endswith("entry_points.txt"))).decode()
    assert "takeup = takeup.pipeline.cli:main" in entry
