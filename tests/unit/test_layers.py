"""The folder tree is the architecture: each area of ``service/keystrata`` imports only
from areas below it (DEVELOPERS.md, "Areas and the rules of the house"), the SDK never
imports the service, and no module is much longer than about 400 lines.

The imports are read with :mod:`ast` from the source files, so a test run does not depend
on what happens to be imported already.
"""

from __future__ import annotations

import ast
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[2]
SERVICE = ROOT / "service" / "keystrata"
CLIENTS = ROOT / "clients" / "keystrata_client"
PHYSICS = ROOT / "service" / "keystrata_physics"

#: Areas from the bottom up; an area may import from itself and from any area before it.
#: Names on one line share a level and must not import each other.
LAYERS: tuple[tuple[str, ...], ...] = (
    ("__init__", "errors", "ids", "clock", "ranges"),  # __init__: the version only
    ("config",),
    ("crypto",),
    ("storage",),
    ("context",),
    ("ledger",),
    ("registry",),
    ("peering",),
    ("links",),
    ("relay",),
    ("restore",),
    ("delivery",),
    ("supply",),
    ("node",),
    ("observability",),
    ("api",),
    ("server",),
    ("loopback",),
    ("demo",),
    ("cli",),
    ("__main__",),
)

#: Modules allowed over the length limit, and why (also listed in DEVELOPERS.md).
LONG_MODULES = {
    # The whole schema in one file, so that a reviewer compares it with a migration
    # revision at a glance.
    "storage/models.py": 560,
}
MAX_LINES = 420


def _level(area: str) -> int:
    for i, names in enumerate(LAYERS):
        if area in names:
            return i
    raise AssertionError(f"area {area!r} is not in LAYERS: place it in the order")


def _area(module: str) -> str:
    parts = module.split(".")
    return parts[1] if len(parts) > 1 else "__init__"


def _imports(path: Path) -> set[str]:
    found: set[str] = set()
    for node in ast.walk(ast.parse(path.read_text())):
        if isinstance(node, ast.ImportFrom) and node.module and node.level == 0:
            if node.module == "keystrata":
                found.update(
                    f"keystrata.{a.name}"
                    if (SERVICE / a.name).is_dir() or (SERVICE / f"{a.name}.py").is_file()
                    else "keystrata"
                    for a in node.names
                )
            elif node.module.startswith(("keystrata.", "keystrata_client")):
                found.add(node.module)
        elif isinstance(node, ast.Import):
            found.update(a.name for a in node.names if a.name.startswith("keystrata"))
    return found


def _service_modules() -> list[Path]:
    return [p for p in sorted(SERVICE.rglob("*.py")) if "migrations" not in p.parts]


def test_every_area_imports_only_from_areas_below_it() -> None:
    wrong: list[str] = []
    for path in _service_modules():
        rel = path.relative_to(SERVICE)
        area = rel.parts[0].removesuffix(".py")
        for module in _imports(path):
            if module.startswith("keystrata_client"):
                if area not in ("cli", "demo", "loopback"):
                    wrong.append(f"{rel}: {module} (only the command line and demo use the SDK)")
                continue
            target = _area(module)
            if target == area:
                continue
            if _level(target) >= _level(area):
                wrong.append(f"{rel} ({area}) imports {module} ({target})")
    assert not wrong, "imports against the layer order:\n" + "\n".join(wrong)


def test_the_sdk_never_imports_the_service() -> None:
    wrong = [
        f"{p.relative_to(CLIENTS)}: {m}"
        for p in sorted(CLIENTS.rglob("*.py"))
        for m in _imports(p)
        if m == "keystrata" or m.startswith("keystrata.")
    ]
    assert not wrong, wrong


#: Standard-library modules that would give the link model I/O, a clock or randomness.
IMPURE = ("os", "io", "sys", "socket", "time", "random", "subprocess", "pathlib", "shutil")


def _all_imports(path: Path) -> set[str]:
    found: set[str] = set()
    for node in ast.walk(ast.parse(path.read_text())):
        if isinstance(node, ast.ImportFrom) and node.module and node.level == 0:
            found.add(node.module)
        elif isinstance(node, ast.Import):
            found.update(a.name for a in node.names)
    return found


def test_the_link_model_is_pure_and_stands_alone() -> None:
    wrong = [
        f"{p.relative_to(PHYSICS)}: {m}"
        for p in sorted(PHYSICS.rglob("*.py"))
        for m in _all_imports(p)
        if m.split(".")[0] in ("keystrata", "keystrata_client", *IMPURE)
    ]
    assert not wrong, wrong


@pytest.mark.parametrize(
    "folder", [SERVICE, CLIENTS, PHYSICS], ids=["service", "clients", "physics"]
)
def test_no_module_is_much_longer_than_400_lines(folder: Path) -> None:
    long = {}
    for path in sorted(folder.rglob("*.py")):
        if "migrations" in path.parts:
            continue
        rel = path.relative_to(folder).as_posix()
        lines = len(path.read_text().splitlines())
        if lines > LONG_MODULES.get(rel, MAX_LINES):
            long[rel] = lines
    assert not long, f"split these modules (or list them in LONG_MODULES with a reason): {long}"


def test_test_modules_have_names_of_their_own() -> None:
    """pytest imports test modules by their file name (the folders are not packages), so
    two tiers with a test file of the same name stop the whole run at collection."""
    seen: dict[str, Path] = {}
    twice = []
    for path in sorted((ROOT / "tests").rglob("test_*.py")):
        if path.name in seen:
            twice.append(f"{seen[path.name].relative_to(ROOT)} and {path.relative_to(ROOT)}")
        seen[path.name] = path
    assert not twice, twice
