"""The layout keeps its promises: one import name, layers that import only downwards, small modules.

Data flows plan -> measure -> store -> analysis -> output; the drivers know transports, never
plans; the simulators are a bench that does not exist and share no code with what they test.
These checks read the source (ast), so they hold for every module, imported or not.
"""

from __future__ import annotations

import ast
import tomllib
from pathlib import Path

import pytest

REPO = Path(__file__).resolve().parent.parent
# folder -> the package name it is installed as (pyproject.toml [tool.setuptools.package-dir])
ROOTS = {
    "runner": "nightbench",
    "drivers": "nightbench.drivers",
    "simulators": "nightbench.simulators",
    "plans": "nightbench.plans",
}

# layer -> the layers it may import (besides itself). `drivers.errors` is the root of the one
# exception hierarchy and may be imported by every layer but the simulators.
ALLOWED: dict[str, set[str]] = {
    "drivers": set(),
    "simulators": set(),
    "plan": {"drivers"},
    "store": set(),
    "measure": {"plan", "store", "drivers"},
    "analysis": {"store", "plan"},
    "output": {"analysis", "store", "plan"},
    "service": {"measure", "store", "plan", "analysis", "output", "drivers", "app"},
    "app": {"plan", "measure", "store", "analysis", "output", "service", "drivers", "simulators", "app"},
}
EVERYONE_MAY = "nightbench.drivers.errors"
MAX_LINES = 400


def module_files() -> list[tuple[str, Path]]:
    out = []
    for folder, package in ROOTS.items():
        for path in sorted((REPO / folder).rglob("*.py")):
            rel = path.relative_to(REPO / folder).with_suffix("")
            parts = [p for p in rel.parts if p != "__init__"]
            out.append((".".join([package, *parts]), path))
    return out


def layer_of(module: str) -> str:
    parts = module.split(".")
    if parts[0] != "nightbench":
        raise ValueError(module)
    if len(parts) == 1:
        return "app"
    second = parts[1]
    if second in ("drivers", "simulators"):
        return second
    if second in ("plan", "measure", "store", "analysis", "output", "service"):
        return second
    return "app"  # cli, runs, demo, simproc, the public API: the shell around the layers


def imports_of(module: str, path: Path) -> list[tuple[int, str]]:
    tree = ast.parse(path.read_text(encoding="utf-8"))
    package = module if path.name == "__init__.py" else module.rsplit(".", 1)[0]
    found = []
    for node in ast.walk(tree):
        if isinstance(node, ast.Import):
            found += [(node.lineno, alias.name) for alias in node.names]
        elif isinstance(node, ast.ImportFrom):
            if node.level:
                base = package.split(".")[: len(package.split(".")) - node.level + 1]
                name = ".".join(base + ([node.module] if node.module else []))
            else:
                name = node.module or ""
            found.append((node.lineno, name))
            found += [(node.lineno, f"{name}.{alias.name}") for alias in node.names if name == "nightbench"]
    return found


def test_every_module_imports_only_the_layers_below_it():
    wrong = []
    for module, path in module_files():
        if module.startswith("nightbench.plans"):
            continue
        layer = layer_of(module)
        for line, name in imports_of(module, path):
            if name.split(".")[0] in ("runner", "drivers", "simulators", "plans"):
                wrong.append(f"{path.relative_to(REPO)}:{line} imports {name}: use the nightbench.* name")
                continue
            if not name.startswith("nightbench.") or name == "nightbench":
                continue
            if layer != "simulators" and (name == EVERYONE_MAY or name.startswith(EVERYONE_MAY + ".")):
                continue
            target = layer_of(name)
            if target != layer and target not in ALLOWED[layer]:
                wrong.append(f"{path.relative_to(REPO)}:{line} ({layer}) imports {name} ({target})")
    assert not wrong, "\n".join(wrong)


def test_the_layer_check_sees_a_forbidden_edge(tmp_path):
    # the checker itself must be able to fail: analysis importing the engine is caught
    bad = tmp_path / "bad.py"
    bad.write_text("from nightbench.measure.engine import Engine\nimport nightbench.drivers.visa\n")
    names = [n for _, n in imports_of("nightbench.analysis.bad", bad)]
    assert [layer_of(n) for n in names] == ["measure", "drivers"]
    assert "measure" not in ALLOWED["analysis"] and "drivers" not in ALLOWED["analysis"]


def test_no_module_is_longer_than_the_limit():
    long = [
        f"{p.relative_to(REPO)}: {n} lines"
        for _, p in module_files()
        if (n := len(p.read_text(encoding="utf-8").splitlines())) > MAX_LINES
    ]
    assert not long, long


def test_only_the_nightbench_name_is_installed_and_every_package_is():
    # pyproject.toml lists the packages; a folder with an __init__.py that is not listed would be
    # missing from a real (non-editable) install, and a listed name outside nightbench would claim
    # a top-level import name that clashes with other packages.
    config = tomllib.loads((REPO / "pyproject.toml").read_text(encoding="utf-8"))["tool"]["setuptools"]
    listed = set(config["packages"])
    assert all(name == "nightbench" or name.startswith("nightbench.") for name in listed), listed
    on_disk = {module for module, path in module_files() if path.name == "__init__.py"}
    assert on_disk == listed, on_disk ^ listed
    assert config["package-dir"] == {"nightbench": "runner", **{v: k for k, v in ROOTS.items() if k != "runner"}}


@pytest.mark.parametrize("name", ["runner", "drivers", "simulators", "plans"])
def test_the_folder_names_are_not_import_names(name, tmp_path):
    # from a folder other than the checkout, the installed package answers to nightbench only
    import subprocess
    import sys

    code = f"import importlib.util, nightbench; print(importlib.util.find_spec({name!r}) is None)"
    res = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, cwd=tmp_path, timeout=60)
    assert res.returncode == 0, res.stderr
    assert res.stdout.strip() == "True"
