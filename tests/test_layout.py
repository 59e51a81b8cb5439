"""The package's shape: layers import only downwards, units stay small, the API is static.

These are the project's own rules (DEVELOPERS.md), checked on the source
text with the standard library's ``ast``, so that a change that blurs a layer
or grows a unit past the limit fails the suite instead of a review.
"""

from __future__ import annotations

import ast
from pathlib import Path

import pytest

PACKAGE = Path(__file__).resolve().parents[1] / "geosr"

#: Largest function, in code lines (no blank lines, comments or docstrings).
MAX_FUNCTION_LINES = 80
#: Largest class, in code lines.
MAX_CLASS_LINES = 300

#: What each layer may import from geosr. Lower layers never import higher ones.
ALLOWED = {
    # modelfile reads and writes .npz model files only (the estimator's save and load).
    "core": {"core", "modelfile", "errors", "enums", "_validation", "_version", "cautions"},
    "raster": {"raster", "core", "errors", "enums", "_validation", "_version", "cautions"},
    "parallel": {"parallel", "errors", "_validation", "_version", "cautions"},
    "modelfile": {"modelfile", "core", "errors", "enums", "_validation", "_version", "cautions"},
}


def _modules():
    return sorted(p for p in PACKAGE.rglob("*.py") if "__pycache__" not in p.parts)


def _layer(path):
    rel = path.relative_to(PACKAGE)
    return rel.parts[0] if len(rel.parts) > 1 else rel.stem


def _geosr_imports(path):
    """The first-level geosr names a module imports (``core``, ``raster``, ...)."""
    tree = ast.parse(path.read_text())
    package = path.relative_to(PACKAGE.parent).with_suffix("").parts
    if package[-1] == "__init__":
        package = package[:-1]
    else:
        package = package[:-1]
    found = set()
    for node in ast.walk(tree):
        if isinstance(node, ast.ImportFrom):
            if node.level:
                base = list(package[: len(package) - node.level + 1])
                target = base + (node.module.split(".") if node.module else [])
                if len(target) == 1 and node.module is None:  # from . import x, y
                    found.update(alias.name for alias in node.names)
                    continue
            elif node.module and node.module.split(".")[0] == "geosr":
                target = node.module.split(".")
            else:
                continue
            if len(target) > 1:
                found.add(target[1])
            else:
                found.update(alias.name for alias in node.names)
        elif isinstance(node, ast.Import):
            for alias in node.names:
                parts = alias.name.split(".")
                if parts[0] == "geosr" and len(parts) > 1:
                    found.add(parts[1])
    return found


def _code_lines(node, source_lines):
    """Lines of a def or class that hold code: no blanks, comments or docstrings."""
    docstrings = set()
    for sub in ast.walk(node):
        body = getattr(sub, "body", None)
        if (
            isinstance(sub, (ast.FunctionDef, ast.AsyncFunctionDef, ast.ClassDef, ast.Module))
            and body
            and isinstance(body[0], ast.Expr)
            and isinstance(body[0].value, ast.Constant)
            and isinstance(body[0].value.value, str)
        ):
            docstrings.update(range(body[0].lineno, body[0].end_lineno + 1))
    count = 0
    for n in range(node.lineno, node.end_lineno + 1):
        text = source_lines[n - 1].strip()
        if text and not text.startswith("#") and n not in docstrings:
            count += 1
    return count


def _compiled(node):
    """True for numba kernels (``@numba.njit(...)`` and friends), exempt from the size rule."""
    for deco in node.decorator_list:
        text = ast.unparse(deco)
        if "njit" in text or "numba" in text or "intrinsic" in text:
            return True
    return False


def _layered_modules():
    """Modules of the layers that have import rules (pipeline, assess, demo and cli may import all)."""
    return [p for p in _modules() if _layer(p) in ALLOWED]


@pytest.mark.parametrize("path", _layered_modules(), ids=lambda p: str(p.relative_to(PACKAGE)))
def test_layers_import_only_downwards(path):
    layer = _layer(path)
    wrong = _geosr_imports(path) - ALLOWED[layer]
    assert not wrong, f"{path.relative_to(PACKAGE)} ({layer} layer) imports {sorted(wrong)}"


@pytest.mark.parametrize("path", _modules(), ids=lambda p: str(p.relative_to(PACKAGE)))
def test_units_stay_small(path):
    source = path.read_text()
    lines = source.splitlines()
    too_big = []
    for node in ast.walk(ast.parse(source)):
        if isinstance(node, (ast.FunctionDef, ast.AsyncFunctionDef)) and not _compiled(node):
            n = _code_lines(node, lines)
            if n > MAX_FUNCTION_LINES:
                too_big.append(f"function {node.name} ({n} lines > {MAX_FUNCTION_LINES})")
        elif isinstance(node, ast.ClassDef):
            n = _code_lines(node, lines)
            if n > MAX_CLASS_LINES:
                too_big.append(f"class {node.name} ({n} lines > {MAX_CLASS_LINES})")
    assert not too_big, f"{path.relative_to(PACKAGE)}: {', '.join(too_big)}"


def test_public_api_stub_matches_the_package():
    import geosr

    stub = ast.parse((PACKAGE / "__init__.pyi").read_text())
    declared = next(
        ast.literal_eval(node.value)
        for node in stub.body
        if isinstance(node, ast.Assign) and node.targets[0].id == "__all__"
    )
    imported = {
        alias.asname or alias.name
        for node in stub.body
        if isinstance(node, ast.ImportFrom)
        for alias in node.names
    }
    assert sorted(declared) == sorted(geosr.__all__)
    assert imported == set(geosr.__all__)
    for name in geosr.__all__:
        assert getattr(geosr, name) is not None, name
