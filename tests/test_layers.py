"""The layers import in one direction only (read from the source with the ast module, nothing is imported).

cli -> workflows -> (reports, registry, threats_catalog, estimation) -> root package (errors, vocabulary, JSON
helpers). registry, estimation and threats_catalog import nothing from one another; reports imports no registry and
only types and constants (capitalised names) from estimation and threats_catalog; nothing below cli imports typer.
"""

from __future__ import annotations

import ast
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parent.parent
LAYERS = ("cli", "workflows", "reports", "registry", "threats_catalog", "estimation")
ROOT_MODULES = {"errors", "jsonsafe", "safefiles", "vocabulary"}
FORBIDDEN: dict[str, set[str]] = {
    "workflows": {"cli"},
    "reports": {"cli", "workflows", "registry"},
    "registry": {"cli", "workflows", "reports", "threats_catalog", "estimation"},
    "threats_catalog": {"cli", "workflows", "reports", "registry", "estimation"},
    "estimation": {"cli", "workflows", "reports", "registry", "threats_catalog"},
    "ivdossier": {"cli", "workflows", "reports", "registry", "threats_catalog", "estimation"},
}
TYPES_ONLY: dict[str, set[str]] = {"reports": {"estimation", "threats_catalog"}}
UI_PACKAGES = ("typer", "click", "rich")
# Imports still waiting to move to their layer; this list may only shrink, and the test below fails if an entry
# no longer occurs, so it cannot go stale.
PENDING: set[tuple[str, str]] = set()


def _imports(path: Path) -> list[tuple[str, list[str]]]:
    """(module, imported names) for every import statement in the file, at any depth."""
    out: list[tuple[str, list[str]]] = []
    for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"))):
        if isinstance(node, ast.Import):
            out.extend((alias.name, []) for alias in node.names)
        elif isinstance(node, ast.ImportFrom) and node.module and node.level == 0:
            out.append((node.module, [alias.name for alias in node.names]))
    return out


def _layer_of(module: str) -> str | None:
    parts = module.split(".")
    if parts[0] != "ivdossier":
        return None
    return parts[1] if len(parts) > 1 and parts[1] in LAYERS else "ivdossier"


def _files(layer: str) -> list[Path]:
    folder = ROOT / layer
    return sorted(folder.rglob("*.py"))


def _violations() -> list[tuple[str, str, str]]:
    found = []
    for layer in (*LAYERS, "ivdossier"):
        for path in _files(layer):
            rel = str(path.relative_to(ROOT))
            if "/migrations/" in rel:
                continue
            for module, names in _imports(path):
                if module.split(".")[0] in UI_PACKAGES and layer != "cli":
                    found.append((rel, module, f"{layer} must not import the terminal library {module}"))
                target = _layer_of(module)
                if target is None or target == layer:
                    continue
                if target in FORBIDDEN.get(layer, set()) and target not in TYPES_ONLY.get(layer, set()):
                    found.append((rel, module, f"{layer} must not import {target}"))
                if target in TYPES_ONLY.get(layer, set()) and (
                    not names or any(not n[0].isupper() for n in names)
                ):
                    found.append((rel, module, f"{layer} may import only types and constants from {target}"))
                if (
                    target == "ivdossier"
                    and module.split(".")[1:2]
                    and module.split(".")[1] not in ROOT_MODULES
                ):
                    found.append((rel, module, f"the root package holds only {sorted(ROOT_MODULES)}"))
    return found


def test_layers_import_in_one_direction() -> None:
    unexpected = [v for v in _violations() if (v[0], v[1]) not in PENDING]
    assert not unexpected, "\n".join(f"{f}: imports {m} ({why})" for f, m, why in unexpected)


def test_pending_list_only_names_imports_that_still_exist() -> None:
    present = {(f, m) for f, m, _ in _violations()}
    assert present >= PENDING, f"remove from PENDING: {sorted(PENDING - present)}"


def test_root_package_holds_only_shared_modules() -> None:
    modules = {p.stem for p in (ROOT / "ivdossier").glob("*.py")} - {"__init__"}
    assert modules <= ROOT_MODULES, f"move {sorted(modules - ROOT_MODULES)} into a layer"


@pytest.mark.parametrize("layer", LAYERS)
def test_every_layer_has_files(layer: str) -> None:
    # guards the test itself: a renamed folder would otherwise make every check above pass vacuously
    assert _files(layer), f"no Python files under {layer}/"
