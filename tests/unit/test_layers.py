"""The layers of DESIGN.md ("Layers"), checked on the source of every module.

Each module belongs to a layer by its path; it may import only from its own
layer and the layers below. Read with ``ast`` (``import tdkit`` loads every
layer anyway), so a forbidden import fails here before it ships.
"""

from __future__ import annotations

import ast
import pathlib

import pytest

import tdkit

SRC = pathlib.Path(tdkit.__file__).parent

KERNEL = {"_errors", "_validation", "_seeding", "_greedy", "_text", "_progress"}
#: Layer 3 outside the runs/ folder: public paths kept where users import them.
RUNS_PUBLIC_PATHS = {"loop", "history", "store", "sweep", "batch", "_store_files",
                     "_store_history", "_store_state"}
TOP = {"verify", "testing", "plot", "demo", "__main__"}
OPTIONAL = ("matplotlib", "tqdm", "pandas", "dask", "distributed", "numba", "scipy")


def _layer(module: str) -> int:
    head = module.split(".")[0]
    if head in KERNEL:
        return 1
    if head == "runs" or head in RUNS_PUBLIC_PATHS:
        return 3
    if head in TOP:
        return 4
    if head == "__init__":
        return 5  # the package root re-exports everything
    return 2


def _modules() -> list[str]:
    found = []
    for path in sorted(SRC.rglob("*.py")):
        rel = path.relative_to(SRC).with_suffix("")
        found.append(".".join(rel.parts))
    return found


def _imports(module: str) -> tuple[set[str], set[str]]:
    """(tdkit modules imported anywhere, third-party modules imported at module level)."""
    path = SRC / (module.replace(".", "/") + ".py")
    package = module.split(".")[:-1]
    if module.endswith("__init__"):
        package = module.split(".")[:-1]
    tree = ast.parse(path.read_text(encoding="utf-8"))
    inner: set[str] = set()
    top_level: set[str] = set()
    for node in ast.walk(tree):
        names: list[str] = []
        if isinstance(node, ast.Import):
            names = [alias.name for alias in node.names]
            for name in names:
                if name.startswith("tdkit."):
                    inner.add(name[len("tdkit."):])
        elif isinstance(node, ast.ImportFrom):
            if node.level:
                base = package[: len(package) - node.level + 1]
                target = ".".join([*base, *(node.module.split(".") if node.module else [])])
                inner.add(target if target else "__init__")
                for alias in node.names:  # "from . import x" imports module x
                    if not node.module:
                        inner.add(".".join([*base, alias.name]))
            else:
                names = [node.module or ""]
                if names[0].startswith("tdkit."):
                    inner.add(names[0][len("tdkit."):])
        if node in tree.body or (isinstance(node, (ast.Import, ast.ImportFrom))
                                 and node in getattr(tree, "body", [])):
            top_level.update(n.split(".")[0] for n in names)
    return inner, top_level


@pytest.mark.parametrize("module", _modules())
def test_imports_point_down(module):
    here = _layer(module)
    inner, _ = _imports(module)
    upward = sorted(m for m in inner if _layer(m) > here and m != "__init__")
    assert not upward, f"tdkit.{module} (layer {here}) imports {upward} from a higher layer"


@pytest.mark.parametrize("module", _modules())
def test_the_named_never_edges(module):
    inner, top_level = _imports(module)
    head = module.split(".")[0]
    if head == "learners":
        assert not {m for m in inner if m.split(".")[0] in ({"runs", "verify", "plot"}
                                                             | RUNS_PUBLIC_PATHS)}
    if head.startswith("dp"):
        assert not {m for m in inner if m.split(".")[0] == "learners"}
    # The compiled kernels import numba at their top, and are themselves imported
    # only when the compiled path is asked for (tests/unit/runs/test_batch_compiled.py checks
    # that import tdkit does not import numba).
    if _layer(module) <= 3 and not module.endswith("._kernels"):
        heavy = sorted(top_level & set(OPTIONAL))
        assert not heavy, f"tdkit.{module} imports {heavy} at import time (import lazily)"


def test_saved_files_are_read_without_pickle():
    """Loading is pickle-free: no module of the store imports pickle (arrays are read with
    ``np.frombuffer`` after their dtype is checked against the plain ones tdkit writes). The
    sweep dispatcher's in-memory round trip between worker
    processes is the only pickle use, and it never reads a file."""
    store_modules = [m for m in _modules() if m.split(".")[-1] in
                     ("store", "_store_files", "_store_state", "_store_history")]
    assert len(store_modules) >= 4
    for module in store_modules:
        text = (SRC / (module.replace(".", "/") + ".py")).read_text(encoding="utf-8")
        assert "import pickle" not in text, module
        assert "allow_pickle=True" not in text, module


def _private_imports(module: str) -> list[str]:
    """Names starting with ``_`` that ``module`` imports from another tdkit module."""
    path = SRC / (module.replace(".", "/") + ".py")
    found = []
    for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"))):
        if isinstance(node, ast.ImportFrom) and (node.level or (node.module or "").startswith(
                "tdkit")):
            found += [f"{node.module}.{a.name}" for a in node.names
                      if a.name.startswith("_") and not a.name.endswith("__")
                      and a.name not in _PRIVATE_MODULES]
    return found


#: Private modules and packages (``from .learners import _targets`` imports a module).
_PRIVATE_MODULES = {path.stem for path in SRC.rglob("_*.py")} | {
    path.name for path in SRC.rglob("_*") if path.is_dir()}


@pytest.mark.parametrize("module", _modules())
def test_no_module_imports_another_modules_private_names(module):
    # What two modules share is a name of a private module (tdkit._bellman.look_ahead), not
    # a private name of a public one (tdkit.dp._look_ahead): private names stay private.
    assert _private_imports(module) == []
