"""The package's layers, read from its source: a layer imports only the layers below it, the
shared modules import no layer, and only the models decide by family.

Layers, from the bottom: data < models < posterior < mcmc < checks < app. The shared modules
(exceptions, executors, outputs, plots and the private helpers) serve every layer and import
none. Imports inside functions count too.
"""

import ast
from pathlib import Path

import pytest

import tallchain

PACKAGE = Path(tallchain.__file__).parent
LAYERS = ["data", "models", "posterior", "mcmc", "checks", "app"]


def _modules():
    for path in sorted(PACKAGE.rglob("*.py")):
        yield path, path.relative_to(PACKAGE).parts


def _imported_parts(path, parts):
    """First package-level name of every tallchain module that ``path`` imports."""
    tree = ast.parse(path.read_text())
    here = list(parts[:-1])
    for node in ast.walk(tree):
        if isinstance(node, ast.ImportFrom):
            if node.level:
                base = here[:len(here) - (node.level - 1)]
                target = base + (node.module.split(".") if node.module else [])
                names = [a.name for a in node.names]
                yield target[0] if target else names[0], node.lineno
            elif node.module and node.module.split(".")[0] == "tallchain":
                rest = node.module.split(".")[1:]
                yield rest[0] if rest else node.names[0].name, node.lineno
        elif isinstance(node, ast.Import):
            for a in node.names:
                if a.name.split(".")[0] == "tallchain" and "." in a.name:
                    yield a.name.split(".")[1], node.lineno


def _rank(part):
    name = part.removesuffix(".py")
    return LAYERS.index(name) if name in LAYERS else None


def test_a_layer_imports_only_the_layers_below_it():
    wrong = []
    for path, parts in _modules():
        if parts == ("__init__.py",):
            continue                     # the public face re-exports every layer
        own = _rank(parts[0])
        for target, line in _imported_parts(path, parts):
            rank = _rank(target)
            if rank is None:
                continue                 # a shared module: anyone may import it
            if own is None or rank > own:
                wrong.append(f"{'/'.join(parts)}:{line} imports {target}")
    assert not wrong, "\n".join(wrong)


def test_the_checks_find_an_upward_import():
    # Power check of the test above: a module of the models layer importing mcmc is caught.
    fake = PACKAGE / "models" / "_fake.py"
    parts = fake.relative_to(PACKAGE).parts
    source = "from ..mcmc import sample\n"
    targets = [t for t, _ in _parse_source(source, parts)]
    assert targets == ["mcmc"] and _rank("mcmc") > _rank(parts[0])


def _parse_source(source, parts):
    import tempfile

    with tempfile.NamedTemporaryFile("w", suffix=".py", delete=False) as fh:
        fh.write(source)
    return list(_imported_parts(Path(fh.name), parts))


def test_only_the_models_compare_family_names():
    found = []
    for path, parts in _modules():
        if parts[0] == "models":
            continue
        for node in ast.walk(ast.parse(path.read_text())):
            if isinstance(node, ast.Compare):
                names = [n.attr for n in ast.walk(node) if isinstance(n, ast.Attribute)]
                if any(n in ("family_name", "family") for n in names) and any(
                        isinstance(c, ast.Constant) and isinstance(c.value, str)
                        for c in [node.left, *node.comparators]):
                    found.append(f"{'/'.join(parts)}:{node.lineno}")
    assert not found, f"dispatch on a family-name string outside models/: {found}"


@pytest.mark.parametrize("layer", LAYERS)
def test_every_layer_is_a_package_with_a_public_face(layer):
    init = PACKAGE / layer / "__init__.py"
    assert init.exists()
    assert "__all__" in init.read_text()
