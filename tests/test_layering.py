"""The engine never imports the site workflow (DEVELOPERS.md: imports go
one way, mapping -> fingerprint), and no module uses pickle or the global
numpy random state. Checked on the source text with Python's own ``ast``
parser, so it sees every import, including ones inside functions."""

import ast
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]


def _modules(package):
    return sorted((ROOT / package).rglob("*.py"))


def _imports(path):
    tree = ast.parse(path.read_text(encoding="utf-8"), filename=str(path))
    for node in ast.walk(tree):
        if isinstance(node, ast.Import):
            for alias in node.names:
                yield alias.name
        elif isinstance(node, ast.ImportFrom) and node.level == 0 and node.module:
            yield node.module


@pytest.mark.parametrize("path", _modules("fingerprint"), ids=lambda p: str(p.relative_to(ROOT)))
def test_engine_does_not_import_mapping(path):
    bad = [m for m in _imports(path) if m == "mapping" or m.startswith("mapping.")]
    assert not bad, f"{path} imports {bad}"


@pytest.mark.parametrize(
    "path", _modules("fingerprint") + _modules("mapping"), ids=lambda p: str(p.relative_to(ROOT))
)
def test_no_pickle_and_no_global_random_state(path):
    mods = set(_imports(path))
    assert "pickle" not in mods and "cPickle" not in mods, f"{path} imports pickle"
    tree = ast.parse(path.read_text(encoding="utf-8"))
    for node in ast.walk(tree):
        # np.random.<fn>(...) with a legacy global-state function
        if isinstance(node, ast.Call) and isinstance(node.func, ast.Attribute):
            f = node.func
            if (
                isinstance(f.value, ast.Attribute)
                and f.value.attr == "random"
                and isinstance(f.value.value, ast.Name)
                and f.value.value.id in {"np", "numpy"}
                and f.attr not in {"default_rng", "Generator", "SeedSequence", "PCG64", "RandomState"}
            ):
                pytest.fail(f"{path}:{node.lineno} uses the global numpy random state (np.random.{f.attr})")
        if isinstance(node, ast.keyword) and node.arg == "allow_pickle":
            assert isinstance(node.value, ast.Constant) and node.value.value is False, (
                f"{path}:{node.lineno} allows pickle"
            )
