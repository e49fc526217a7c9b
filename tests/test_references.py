"""Nothing in the project points at a file the project lacks (a newcomer follows these paths)."""

from __future__ import annotations

import re
import subprocess
from pathlib import Path

REPO = Path(__file__).resolve().parent.parent
PATH = re.compile(
    r"(?<![\w./-])((?:runner|drivers|simulators|plans|tests|bench|docs)/[\w/.-]*\w\.(?:py|md|yaml|toml|csv|s2p))"
)


def tracked() -> list[Path]:
    out = subprocess.run(["git", "ls-files"], cwd=REPO, capture_output=True, text=True, check=True).stdout
    files = [REPO / line for line in out.splitlines()]
    return [f for f in files if f.suffix in (".py", ".md", ".yaml", ".toml") and f.exists()]


def test_every_path_named_in_code_and_docs_exists():
    missing = []
    for f in tracked():
        for n, line in enumerate(f.read_text(encoding="utf-8").splitlines(), 1):
            for ref in PATH.findall(line):
                if not (REPO / ref).exists() and "tmp" not in ref:
                    missing.append(f"{f.relative_to(REPO)}:{n}: {ref}")
    assert not missing, "\n".join(missing)


def test_no_reference_to_a_design_file_outside_the_project():
    # the project's own design is docs/design.md; an upper-case design file is one users do not have
    name = "DESIGN" + ".md"
    this = Path(__file__).resolve()
    hits = [
        f"{f.relative_to(REPO)}:{n}"
        for f in tracked()
        if f.resolve() != this
        for n, line in enumerate(f.read_text(encoding="utf-8").splitlines(), 1)
        if name in line
    ]
    assert not hits, hits
