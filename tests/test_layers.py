"""The package's architecture, enforced: each layer imports only from the layers below it.

A layer may import from any layer below it and from its own package, never from a layer beside
or above it.  Two checks: every import statement in the source, those inside functions too
(read with :mod:`ast`), and what importing each package really loads (in a fresh interpreter,
as ``test_cluster.py`` checks that Dask stays unloaded).
"""
import ast
import json
import subprocess
import sys
import zipfile
from pathlib import Path

import pytest

import hybrid

ROOT = Path(hybrid.__file__).parent
LAYERS = [            # lowest first; packages in one row may not import each other
    ["common"],
    ["core", "io"],
    ["engines", "datasets"],
    ["estimator"],
    ["planning", "evaluation"],
    ["app"],
    ["cli"],
]
LEVEL = {pkg: n for n, row in enumerate(LAYERS) for pkg in row}


def allowed(importer: str, imported: str) -> bool:
    return importer == imported or LEVEL[imported] < LEVEL[importer]


def _imports(path: Path):
    """(line, hybrid package) of every import of a hybrid module in ``path``."""
    for node in ast.walk(ast.parse(path.read_text())):
        if isinstance(node, ast.ImportFrom):
            assert node.level == 0, f"{path}:{node.lineno}: relative import; write hybrid.<package>"
            names = [node.module] + [f"{node.module}.{a.name}" for a in node.names]
        elif isinstance(node, ast.Import):
            names = [a.name for a in node.names]
        else:
            continue
        for name in names:
            parts = name.split(".")
            if parts[0] == "hybrid" and len(parts) > 1 and parts[1] in LEVEL:
                yield node.lineno, parts[1]


def test_every_module_belongs_to_a_layer():
    loose = sorted(p.name for p in ROOT.glob("*.py") if p.name not in ("__init__.py", "__main__.py"))
    assert loose == []
    packages = sorted(p.name for p in ROOT.iterdir() if (p / "__init__.py").exists())
    assert packages == sorted(LEVEL)


def test_imports_only_go_down():
    wrong = []
    for pkg in LEVEL:
        for path in sorted((ROOT / pkg).glob("*.py")):
            for line, target in _imports(path):
                if not allowed(pkg, target):
                    wrong.append(f"{path.relative_to(ROOT.parent)}:{line} imports hybrid.{target}")
    assert wrong == []


@pytest.mark.parametrize("pkg", sorted(LEVEL))
def test_importing_a_layer_loads_only_layers_below(pkg):
    # every module of the package imported, then the hybrid packages that came with it
    code = ("import importlib, json, pkgutil, sys; import hybrid." + pkg + " as p; "
            "[importlib.import_module(m.name) for m in pkgutil.iter_modules(p.__path__, p.__name__ + '.')]; "
            "print(json.dumps(sorted({m.split('.')[1] for m in sys.modules "
            "if m.startswith('hybrid.') and m.count('.') >= 1})))")
    done = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    loaded = json.loads(done.stdout)
    assert pkg in loaded
    assert [p for p in loaded if not allowed(pkg, p)] == []


def test_a_built_wheel_holds_every_package(tmp_path):
    # setuptools packaging must find the subpackages and the demo's settings file
    subprocess.run([sys.executable, "-m", "pip", "wheel", "--no-deps", "-q",
                    "-w", str(tmp_path), str(ROOT.parent)], check=True, capture_output=True)
    wheel, = tmp_path.glob("hybrid-*.whl")
    names = set(zipfile.ZipFile(wheel).namelist())
    for pkg in LEVEL:
        assert f"hybrid/{pkg}/__init__.py" in names
    source = {str(p.relative_to(ROOT.parent)) for p in ROOT.rglob("*.py")}
    assert source <= names
    assert "hybrid/datasets/coffee.toml" in names
    # and it imports, with the demo's settings, from an unpacked copy outside the source tree
    zipfile.ZipFile(wheel).extractall(tmp_path / "site")
    code = ("import hybrid, hybrid.cli; from hybrid.datasets.club import DEMO_CONFIG; "
            "print(hybrid.__file__, DEMO_CONFIG.exists(), hybrid.HybridFactorModel.__name__)")
    done = subprocess.run([sys.executable, "-I", "-c", f"import sys; sys.path.insert(0, {str(tmp_path / 'site')!r}); " + code],
                          capture_output=True, text=True, check=True)
    where, exists, name = done.stdout.split()
    assert where.startswith(str(tmp_path / "site")) and exists == "True" and name == "HybridFactorModel"


def _module_graph():
    graph = {}
    for path in ROOT.rglob("*.py"):
        name = ".".join(path.relative_to(ROOT.parent).with_suffix("").parts).removesuffix(".__init__")
        edges = set()
        for node in ast.walk(ast.parse(path.read_text())):
            if isinstance(node, ast.ImportFrom) and node.module and node.module.startswith("hybrid."):
                edges.add(node.module)
                edges.update(f"{node.module}.{a.name}" for a in node.names)
            elif isinstance(node, ast.Import):
                edges.update(a.name for a in node.names if a.name.startswith("hybrid."))
        graph[name] = edges
    return {m: {e for e in edges if e in graph and e != m} for m, edges in graph.items()}


def test_no_import_cycles_between_modules():
    # imports inside functions count: a cycle hidden behind one is still a cycle
    graph = _module_graph()
    done, stack, cycles = set(), [], []

    def visit(m):
        if m in stack:
            cycles.append(stack[stack.index(m):] + [m])
            return
        if m in done:
            return
        stack.append(m)
        for n in sorted(graph[m]):
            if not n.startswith(m + "."):   # a package's __init__ importing its own module is not a cycle
                visit(n)
        stack.pop()
        done.add(m)

    for m in sorted(graph):
        visit(m)
    assert cycles == []
