"""What the project uses is declared, and no test skips quietly over a missing piece of it.

numba once came only through datashader: a change there would have turned every compiled-path
test into a skip and CI green. A test that needs something goes through ``tests/_need.py``
(skips on a workstation, fails under CI).
"""

from __future__ import annotations

import ast
import importlib.metadata as md
import re
import sys
from pathlib import Path

try:
    import tomllib
except ModuleNotFoundError:  # Python 3.10
    import tomli as tomllib

ROOT = Path(__file__).resolve().parent.parent
PACKAGE_DIRS = ("core", "readers", "diagnostics", "engine", "audit", "app", "demo_data")
#: imported only where the code runs inside one (a notebook): looked up, never required
OPTIONAL = {"IPython"}
#: the standard library of this Python, and Python 3.10's stand-in for tomllib
NOT_DISTRIBUTIONS = set(sys.stdlib_module_names) | {"tomli", "swarmaudit", "__future__"}


def _imported_modules(folders) -> set[str]:
    names = set()
    for folder in folders:
        for path in (ROOT / folder).rglob("*.py"):
            for node in ast.walk(ast.parse(path.read_text(), str(path))):
                if isinstance(node, ast.Import):
                    names.update(a.name.split(".")[0] for a in node.names)
                elif isinstance(node, ast.ImportFrom) and node.level == 0 and node.module:
                    names.add(node.module.split(".")[0])
    return names


def _declared(extra: str | None = None) -> set[str]:
    project = tomllib.loads((ROOT / "pyproject.toml").read_text())["project"]
    reqs = project["dependencies"] + (project["optional-dependencies"][extra] if extra else [])
    return {re.split(r"[\s<>=!~;\[]", r, maxsplit=1)[0].lower().replace("_", "-") for r in reqs}


def _distributions(modules) -> dict[str, set[str]]:
    found = md.packages_distributions()
    return {m: {d.lower().replace("_", "-") for d in found.get(m, [])} for m in modules}


def test_every_library_the_package_imports_is_declared():
    used = _imported_modules(PACKAGE_DIRS) - NOT_DISTRIBUTIONS - OPTIONAL
    assert "numba" in used and "pyarrow" in used      # the walk does see lazy imports
    declared = _declared()
    missing = {m: d for m, d in _distributions(used).items() if not d & declared}
    assert not missing, f"imported but not in [project] dependencies: {missing}"


def test_every_library_the_tests_import_is_declared_for_them():
    local = {p.stem for p in (ROOT / "tests").glob("*.py")} | {p.stem for p in (ROOT / "bench").glob("*.py")}
    used = _imported_modules(["tests"]) - NOT_DISTRIBUTIONS - OPTIONAL - local
    declared = _declared("test")
    # what a declared library brings along itself (tornado under bokeh) is declared through it
    brought = set()
    for dist in declared:
        try:
            brought.update(re.split(r"[\s<>=!~;\[(]", r, maxsplit=1)[0].lower().replace("_", "-")
                           for r in md.requires(dist) or [] if "extra ==" not in r)
        except md.PackageNotFoundError:
            pass
    missing = {m: d for m, d in _distributions(used).items() if not d & (declared | brought)}
    assert not missing, f"imported by the tests but not declared: {missing}"


#: skips that are not about a missing dependency
ALLOWED_SKIPS = {
    "test_fuzz_readers.py": "only part of the fuzz module ran",   # a -k selection, not a lack
}


def test_no_test_skips_past_what_it_needs():
    bare = re.compile(r"pytest\.(importorskip|skip)\(|mark\.skipif\(|mark\.skip\b")
    found = []
    for path in sorted((ROOT / "tests").glob("test_*.py")):
        for i, line in enumerate(path.read_text().splitlines(), 1):
            if bare.search(line) and not (path.name in ALLOWED_SKIPS and ALLOWED_SKIPS[path.name] in
                                          "\n".join(path.read_text().splitlines()[i - 1:i + 1])):
                found.append(f"{path.name}:{i}: {line.strip()}")
    found = [f for f in found if not f.startswith("test_declared.py")]
    assert not found, ("skip through tests/_need.py (need / need_that) so CI fails instead:\n"
                       + "\n".join(found))
