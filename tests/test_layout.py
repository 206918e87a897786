"""The package layout: imports point one way, kernel <- bindings.

``kernel/`` (``galerkit``) never imports ``galerkit.bindings``; each
subpackage of ``bindings/`` imports the kernel and only the siblings listed in
``ALLOWED`` (the seams named in ``bindings/__init__.py`` and DEVELOPERS.md).
The check reads the sources with :mod:`ast`, so imports inside functions count.
"""

import ast
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]
SUBPACKAGES = ("command", "files", "host", "distributed")
# subpackage -> the sibling subpackages it may import
ALLOWED = {
    "command": {"files", "distributed"},
    "files": set(),
    "host": set(),
    "distributed": {"files"},
}


def imported_modules(path: Path, package: str):
    """Absolute names of every module ``path`` imports (``package``: its own package)."""
    tree = ast.parse(path.read_text(), filename=str(path))
    out = []
    for node in ast.walk(tree):
        if isinstance(node, ast.Import):
            out += [(a.name, node.lineno) for a in node.names]
        elif isinstance(node, ast.ImportFrom):
            if node.level:
                base = package.split(".")
                base = base[:len(base) - node.level + 1]
                name = ".".join(base + ([node.module] if node.module else []))
            else:
                name = node.module
            out.append((name, node.lineno))
            # "from galerkit.bindings import files" imports a subpackage
            out += [(f"{name}.{a.name}", node.lineno) for a in node.names]
    return out


def _package_of(path: Path):
    rel = path.relative_to(ROOT).with_suffix("")
    parts = list(rel.parts)
    if parts[0] == "kernel":
        parts[0] = "galerkit"
    else:
        parts = ["galerkit"] + parts
    return ".".join(parts[:-1])


def test_the_four_subpackages_exist():
    for sub in SUBPACKAGES:
        assert (ROOT / "bindings" / sub / "__init__.py").is_file(), sub
    flat = sorted(p.name for p in (ROOT / "bindings").glob("*.py") if p.name != "__init__.py")
    assert flat == [], f"modules left at the top of bindings/: {flat}"


#: the one documented exception (kernel/__init__.py): ``galerkit.read_mesh`` and
#: ``galerkit.write_solution`` are lazy attributes taken from galerkit.bindings.files
KERNEL_EXCEPTION = {"__init__.py": {"galerkit.bindings", "galerkit.bindings.files"}}


@pytest.mark.parametrize("path", sorted((ROOT / "kernel").rglob("*.py")), ids=lambda p: p.name)
def test_kernel_never_imports_bindings(path):
    allowed = KERNEL_EXCEPTION.get(path.name, set())
    bad = [(n, line) for n, line in imported_modules(path, _package_of(path))
           if (n == "galerkit.bindings" or n.startswith("galerkit.bindings.")) and n not in allowed]
    assert not bad, f"{path.relative_to(ROOT)} imports bindings: {bad}"


def test_importing_the_kernel_loads_no_bindings_and_the_file_functions_come_lazily():
    import subprocess
    import sys

    code = ("import sys, galerkit as gk\n"
            "assert not [m for m in sys.modules if m.startswith('galerkit.bindings')]\n"
            "import galerkit.bindings.files as f\n"
            "assert gk.read_mesh is f.read_mesh and gk.write_solution is f.write_solution\n"
            "assert 'read_mesh' in dir(gk)\n"
            "try:\n    gk.no_such_name\nexcept AttributeError as e:\n    print(e)\n")
    run = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True)
    assert run.returncode == 0, run.stderr
    assert "no attribute 'no_such_name'" in run.stdout


@pytest.mark.parametrize("path", sorted((ROOT / "bindings").rglob("*.py")),
                         ids=lambda p: str(p.relative_to(ROOT / "bindings")))
def test_each_subpackage_imports_only_the_kernel_and_its_allowed_siblings(path):
    rel = path.relative_to(ROOT / "bindings")
    if len(rel.parts) == 1:  # bindings/__init__.py: documentation only
        assert not imported_modules(path, "galerkit.bindings")
        return
    own = rel.parts[0]
    bad = []
    for name, line in imported_modules(path, _package_of(path)):
        if not name.startswith("galerkit.bindings"):
            continue
        parts = name.split(".")
        if len(parts) < 3:
            bad.append((name, line))  # the bindings package itself
            continue
        sub = parts[2]
        if sub != own and sub not in ALLOWED[own]:
            bad.append((name, line))
    assert not bad, (f"bindings/{rel} imports {bad}; {own} may import the kernel"
                     f" and {sorted(ALLOWED[own]) or 'no sibling'}")


def test_the_checker_sees_a_forbidden_import(tmp_path):
    """The walker must find relative and in-function imports (else the checks above
    would pass on anything)."""
    f = tmp_path / "probe.py"
    f.write_text("def g():\n    from ..host.embed import pattern\n")
    names = [n for n, _ in imported_modules(f, "galerkit.bindings.files")]
    assert "galerkit.bindings.host.embed" in names
