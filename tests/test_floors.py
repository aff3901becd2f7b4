"""The floors of DESIGN.md: each package imports only packages on lower floors, never a sibling on its
own floor, never upward, and never another package's private names. Every import counts: module-level
and inside functions (lazy), absolute and relative, walked with `ast` (nothing is imported)."""
from __future__ import annotations

import ast
from pathlib import Path

import pytest

SOURCE = Path(__file__).resolve().parents[1] / "src" / "oddling"

# Top floor first. "oddling" is the package itself (oddling/__init__.py, the public names); the other
# names are the packages under oddling/ and the modules at its top. The ground floor of DESIGN.md is
# the last two rows: errors.py under the others, since they raise its types.
BUILDING = [
    ("oddling",),
    ("cli",),
    ("demo",),                  # runs the public API on an invented scene; `oddling demo` calls it
    ("api",),                   # the public entry points, gathered from jobs; the CLI calls them
    ("jobs",),
    ("reporting", "logbook"),
    ("evaluation", "embedding"),
    ("bank",),
    ("backbones", "detectors"),
    ("index",),
    ("data",),
    ("paths", "numbers", "files", "progress"),
    ("errors",),
]
FLOORS = {name: len(BUILDING) - 1 - level for level, row in enumerate(BUILDING) for name in row}

# oddling/__init__.py binds __version__ before it imports anything, and Python runs it before any
# module of the package: taking the version from it depends on nothing above.
PACKAGE_METADATA = {"__version__"}


def package_of(module: str) -> str | None:
    """'oddling.jobs.reading' -> 'jobs'; 'oddling' -> 'oddling'; None for anything outside oddling."""
    parts = module.split(".")
    if parts[0] != "oddling":
        return None
    return parts[1] if len(parts) > 1 else "oddling"


def module_name(path: Path) -> str:
    """src/oddling/jobs/reading.py -> 'oddling.jobs.reading'; a package's __init__.py names the package."""
    parts = list(path.relative_to(SOURCE.parent).with_suffix("").parts)
    if parts[-1] == "__init__":
        parts.pop()
    return ".".join(parts)


def imports(source: str, module: str, is_package: bool) -> list[tuple[int, str, list[str]]]:
    """(line, module imported, names taken from it) for every import statement at any depth, with
    relative imports resolved against `module`; `from pkg import a, b` gives pkg.a and pkg.b where
    they may be submodules."""
    found = []
    for node in ast.walk(ast.parse(source)):
        if isinstance(node, ast.Import):
            found += [(node.lineno, alias.name, []) for alias in node.names]
        elif isinstance(node, ast.ImportFrom):
            target = node.module or ""
            if node.level:
                base = module.split(".")[:len(module.split(".")) + is_package - node.level]
                target = ".".join(base + ([node.module] if node.module else []))
            found.append((node.lineno, target, [alias.name for alias in node.names]))
    return found


def violations(source: str, module: str, label: str, is_package: bool = False) -> list[str]:
    """What in `source` (the module `module`, shown as `label`) breaks the floors, one line each:
    "label:line: the import: why"."""
    mine = package_of(module)
    problems = []
    for line, target, names in imports(source, module, is_package):
        theirs = package_of(target)
        if theirs is None:
            continue
        if theirs == "oddling" and names:
            # `from oddling import x`: x is a package or module of its own floor, or a name of the top package
            for name in names:
                if name in FLOORS and name != "oddling":
                    problems += _check(mine, name, f"{label}:{line}: oddling.{name}", [])
                elif name not in PACKAGE_METADATA:
                    problems += _check(mine, "oddling", f"{label}:{line}: oddling ({name})", [])
            continue
        shown = f"{label}:{line}: {target}" + (f" ({', '.join(names)})" if names else "")
        if theirs not in FLOORS:
            problems.append(f"{shown}: {theirs!r} has no floor in tests/test_floors.py")
            continue
        problems += _check(mine, theirs, shown, names)
    return problems


def _check(mine: str, theirs: str, shown: str, names: list[str]) -> list[str]:
    if theirs == mine:
        return []
    if FLOORS[theirs] > FLOORS[mine]:
        return [f"{shown}: {mine} (floor {FLOORS[mine]}) imports upward from {theirs} (floor {FLOORS[theirs]})"]
    if FLOORS[theirs] == FLOORS[mine]:
        return [f"{shown}: {mine} imports its sibling {theirs} (both on floor {FLOORS[mine]})"]
    private = [n for n in names if n.startswith("_") and not n.startswith("__")]
    if private:
        return [f"{shown}: {mine} imports the private {', '.join(private)} of {theirs}; make it public where it "
                "belongs"]
    return []


def all_violations() -> list[str]:
    problems = []
    for path in sorted(SOURCE.rglob("*.py")):
        label = str(path.relative_to(SOURCE.parent))
        module = module_name(path)
        if package_of(module) not in FLOORS:
            problems.append(f"{label}: {package_of(module)!r} has no floor in tests/test_floors.py")
            continue
        problems += violations(path.read_text(encoding="utf-8"), module, label, path.name == "__init__.py")
    return problems


def test_every_import_goes_down_a_floor():
    problems = all_violations()
    assert not problems, "imports that break the floors of DESIGN.md:\n" + "\n".join(problems)


def test_every_package_and_top_module_has_a_floor():
    names = {p.name for p in SOURCE.iterdir() if (p / "__init__.py").is_file()}
    names |= {p.stem for p in SOURCE.glob("*.py") if p.name != "__init__.py"}
    assert names | {"oddling"} == set(FLOORS)


PLANTED = [
    # upward, lazily inside a function
    ("def f():\n    from oddling.jobs.reading import folder\n", "imports upward from jobs"),
    # upward through a relative import
    ("from ..jobs import scoring\n", "imports upward from jobs"),
    ("from .. import api\n", "imports upward from api"),
    # sideways, to a sibling on the same floor
    ("import oddling.detectors.knn\n", "imports its sibling detectors"),
    # a private helper of another package, though downward
    ("from oddling.data.intake import _decode\n", "imports the private _decode of data"),
    # the public names of the top package stand above everything
    ("import oddling\n", "imports upward from oddling"),
    ("from oddling import OddlingWarning\n", "imports upward from oddling"),
]


@pytest.mark.parametrize("source, wanted", PLANTED)
def test_the_checker_catches_a_planted_import(source, wanted):
    problems = violations(source, "oddling.backbones.representation", "planted.py")
    assert len(problems) == 1 and wanted in problems[0], problems
    assert problems[0].startswith("planted.py:")


def test_the_checker_names_the_line_and_the_import():
    source = "import numpy\n\n\ndef load():\n    from oddling.logbook.store import ScoreLog\n"
    assert violations(source, "oddling.bank.store", "oddling/bank/store.py") == [
        "oddling/bank/store.py:5: oddling.logbook.store (ScoreLog): bank (floor 5) imports upward from logbook "
        "(floor 7)"]


def test_the_checker_lets_downward_and_own_package_imports_pass():
    source = ("from oddling.errors import OddlingError\nfrom oddling.data.intake import walk\n"
              "from . import manifest\nfrom .manifest import _mine\nfrom oddling.backbones.weights import _mine_too\n"
              "from oddling import __version__\nimport numpy\n")
    assert violations(source, "oddling.backbones.representation", "ok.py") == []
    assert violations("from . import analysis\n", "oddling.cli", "oddling/cli/__init__.py", is_package=True) == []


if __name__ == "__main__":
    print("\n".join(all_violations()) or "no violations")
