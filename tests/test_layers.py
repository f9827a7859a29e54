"""The import direction of the package: every module imports only from its own layer or below.

Layers, bottom up (DEVELOPERS.md, "Layout and layering"): kernels, models, solvers, physics,
scans, store, output, cli. The check reads every import statement (top level and inside
functions) with the ast module, so a lazy import cannot hide an arrow that points upwards.
Common practice (import contracts), no source.
"""

import ast
import sys
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]
LAYERS = ["kernels", "tba.models", "tba.solvers", "tba.physics", "tba.scans", "tba.store",
          "tba.output", "tba.cli"]
#: third-party libraries a layer may not import (input/output and plotting sit on top)
FORBIDDEN = {
    "kernels": {"h5py", "matplotlib", "distributed", "dask", "tqdm", "xarray"},
    "tba.models": {"h5py", "matplotlib", "distributed", "dask", "tqdm", "xarray", "scipy.sparse"},
    "tba.solvers": {"h5py", "matplotlib", "distributed", "dask", "tqdm", "xarray"},
    "tba.physics": {"h5py", "matplotlib", "distributed", "dask", "tqdm", "xarray"},
    "tba.scans": {"h5py", "matplotlib"},
}


def _modules():
    for path in sorted(list((ROOT / "tba").rglob("*.py")) + list((ROOT / "kernels").rglob("*.py"))):
        rel = path.relative_to(ROOT).with_suffix("")
        name = ".".join(rel.parts)
        if name.endswith(".__init__"):
            name = name[: -len(".__init__")]
        yield name, path


def _layer(module):
    best = None
    for i, prefix in enumerate(LAYERS):
        if module == prefix or module.startswith(prefix + "."):
            best = i
    return best


def _imports(path, module):
    tree = ast.parse(path.read_text(), filename=str(path))
    package = module if path.name == "__init__.py" else module.rpartition(".")[0]
    for node in ast.walk(tree):
        if isinstance(node, ast.Import):
            for alias in node.names:
                yield alias.name, node.lineno
        elif isinstance(node, ast.ImportFrom):
            base = node.module or ""
            if node.level:
                parts = package.split(".")
                base = ".".join(parts[: len(parts) - node.level + 1] + ([base] if base else []))
            if base in ("tba", "kernels"):  # from tba import x: x may be a subpackage
                for alias in node.names:
                    yield f"{base}.{alias.name}", node.lineno
            else:
                yield base, node.lineno


MODULES = list(_modules())


def test_every_module_sits_in_a_layer():
    loose = [m for m, _ in MODULES if _layer(m) is None and m not in ("tba", "tba.__main__")]
    assert not loose, f"modules outside the layers {LAYERS}: {loose}"


@pytest.mark.parametrize("module,path", MODULES, ids=[m for m, _ in MODULES])
def test_imports_point_down(module, path):
    own = _layer(module)
    if own is None:  # the package face (tba/__init__.py) and python -m tba
        return
    upward, forbidden = [], []
    for target, line in _imports(path, module):
        layer = _layer(target)
        if layer is not None and layer > own:
            upward.append(f"line {line}: {target} ({LAYERS[layer]})")
        if target == "tba" and own < len(LAYERS) - 1:
            upward.append(f"line {line}: tba (the package face imports every layer)")
        top = FORBIDDEN.get(LAYERS[own], set())
        if any(target == lib or target.startswith(lib + ".") for lib in top):
            forbidden.append(f"line {line}: {target}")
    assert not upward, f"{module} ({LAYERS[own]}) imports from a higher layer: {upward}"
    assert not forbidden, f"{module} ({LAYERS[own]}) imports what its layer must not: {forbidden}"


def test_kernels_import_nothing_from_tba():
    for module, path in MODULES:
        if module.startswith("kernels"):
            bad = [t for t, _ in _imports(path, module) if t == "tba" or t.startswith("tba.")]
            assert not bad, f"{module} imports {bad}"


def test_the_layer_check_sees_an_upward_import(tmp_path):
    # a module of the solver layer that imports the store must be caught (the test can fail)
    fake = tmp_path / "fake.py"
    fake.write_text("def f():\n    from tba.store.hdf5 import read_store\n")
    targets = [t for t, _ in _imports(fake, "tba.solvers.fake")]
    assert _layer("tba.solvers.fake") < _layer(targets[0])


def test_import_tba_stays_light():
    # `import tba` must not pull in the I/O and plotting stack (start-up time of tba solve)
    import subprocess

    code = ("import sys, tba; heavy = [m for m in ('h5py', 'matplotlib', 'distributed', 'tqdm', "
            "'xarray') if m in sys.modules]; print(','.join(heavy)); sys.exit(1 if heavy else 0)")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=120)
    assert out.returncode == 0, f"import tba loads {out.stdout.strip()}"
