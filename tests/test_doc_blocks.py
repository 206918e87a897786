"""Every code block of README.md and docs/*.md runs as written.

* ```python blocks run, each in a fresh interpreter, in a scratch folder holding a
  copy of ``examples/`` (so paths such as ``examples/pipe-wall.msh`` work as in the
  repository root), and must exit 0;
* ```sh and ```console blocks: every line that starts with ``galerkit`` (after an
  optional ``$ ``) runs through the installed ``galerkit`` script in such a folder
  and must exit 0;
* a block meant only as illustration says so on the line above it,
  ``<!-- illustration: why -->``, and is not run; a block that needs the distributed
  engine says ``<!-- needs: petsc -->`` and runs only where PETSc is installed.
  Illustrations must stay rare (``MAX_ILLUSTRATIONS``), and a python/sh block that
  would run nothing is refused, so no block is left unchecked by accident.

Usage synopses are written as ```text blocks, which are not code.
"""

from __future__ import annotations

import re
import shlex
import shutil
import subprocess
import sys
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]
DOCS = [ROOT / "README.md"] + sorted((ROOT / "docs").glob("*.md"))
SCRIPT = Path(sys.executable).with_name("galerkit")
MAX_ILLUSTRATIONS = 3
FENCE = re.compile(r"^```(\w*)\s*$")


def blocks(path: Path):
    """(language, first line number, code, marker) of every fenced block of a file."""
    out = []
    lines = path.read_text(encoding="utf-8").split("\n")
    i = 0
    while i < len(lines):
        m = FENCE.match(lines[i])
        if m and m.group(1):
            lang, start = m.group(1), i + 1
            j = i + 1
            while j < len(lines) and not lines[j].startswith("```"):
                j += 1
            k = i - 1
            while k >= 0 and not lines[k].strip():
                k -= 1
            above = lines[k].strip() if k >= 0 else ""
            marker = above if above.startswith("<!--") else ""
            out.append((lang, start + 1, "\n".join(lines[start:j]), marker))
            i = j + 1
        else:
            i += 1
    return out


def commands(code: str):
    """The galerkit command lines of a shell block (continuations joined)."""
    joined = re.sub(r"\s*\\\n\s*", " ", code)
    out = []
    for line in joined.split("\n"):
        line = line.strip()
        if line.startswith("$ "):
            line = line[2:]
        if line.startswith("galerkit ") or line == "galerkit":
            out.append(line.split("#")[0].strip() if " #" in line else line)
    return out


ALL = [(p, *b) for p in DOCS for b in blocks(p)]
RUNNABLE = [b for b in ALL if b[1] in ("python", "sh", "console")]


def _id(b):
    return f"{b[0].relative_to(ROOT)}:{b[2]}"


def _petsc_available():
    try:
        import petsc4py  # noqa: F401
        from mpi4py import MPI  # noqa: F401
    except ImportError:
        return False
    return True


@pytest.fixture
def scratch(tmp_path):
    shutil.copytree(ROOT / "examples", tmp_path / "examples")
    return tmp_path


def test_the_documentation_has_blocks_and_few_illustrations():
    assert len(RUNNABLE) >= 10, [_id(b) for b in RUNNABLE]
    shown = [_id(b) for b in ALL if b[4].startswith("<!-- illustration")]
    assert len(shown) <= MAX_ILLUSTRATIONS, f"too many blocks only for illustration: {shown}"
    for b in ALL:
        if b[4]:
            assert re.fullmatch(r"<!-- (illustration: .+|needs: petsc) -->", b[4]), (
                f"{_id(b)}: unknown marker {b[4]!r}")


@pytest.mark.parametrize("block", RUNNABLE, ids=_id)
def test_block_runs_as_written(block, scratch):
    path, lang, line, code, marker = block
    where = f"{path.relative_to(ROOT)}, block at line {line}"
    if marker.startswith("<!-- illustration"):
        pytest.skip(f"{where}: {marker}")
    if marker == "<!-- needs: petsc -->" and not _petsc_available():
        pytest.skip(f"{where}: needs the distributed engine (make mpi)")
    if lang == "python":
        run = subprocess.run([sys.executable, "-c", code], cwd=scratch, capture_output=True,
                             text=True, timeout=600)
        assert run.returncode == 0, f"{where} failed:\n{run.stdout[-3000:]}\n{run.stderr[-3000:]}"
        return
    todo = commands(code)
    assert todo, (f"{where}: a shell block without a galerkit command; run it here, write "
                  "it as a ```text block, or mark it <!-- illustration: why -->")
    exe = [str(SCRIPT)] if SCRIPT.exists() else [sys.executable, "-m",
                                                 "galerkit.bindings.command.cli"]
    for cmd in todo:
        args = shlex.split(cmd)[1:]
        run = subprocess.run(exe + args, cwd=scratch, capture_output=True, text=True,
                             timeout=600)
        assert run.returncode == 0, (f"{where}: {cmd!r} exited {run.returncode}:\n"
                                     f"{run.stdout[-3000:]}\n{run.stderr[-3000:]}")


def test_the_block_reader_finds_markers_and_commands(tmp_path):
    """The reader itself (else the checks above could pass on nothing)."""
    doc = tmp_path / "d.md"
    doc.write_text("text\n\n<!-- illustration: demo -->\n```python\nraise SystemExit(3)\n```\n"
                   "```sh\n$ galerkit mesh-info a.msh \\\n   --worst 2\nmake x\n```\n")
    found = blocks(doc)
    assert [(b[0], b[3]) for b in found] == [("python", "<!-- illustration: demo -->"),
                                             ("sh", "")]
    assert commands(found[1][2]) == ["galerkit mesh-info a.msh --worst 2"]
