"""The package's shape: imports flow one way (stages above, shared vocabulary below).

Walks every module of ``specan`` with ``ast`` (lazy imports inside functions included) and
fails on an import cycle, on a name with a leading underscore imported from another module,
and on a private module (``_common``) imported from outside its own package.
"""

import ast
from pathlib import Path

PACKAGE = Path(__file__).resolve().parents[1] / "specan"


def _module_name(path):
    parts = list(path.relative_to(PACKAGE.parent).with_suffix("").parts)
    if parts[-1] == "__init__":
        parts = parts[:-1]
    return ".".join(parts)


def _is_module(name):
    rel = Path(*name.split("."))
    return (PACKAGE.parent / rel.with_suffix(".py")).is_file() or (PACKAGE.parent / rel / "__init__.py").is_file()


def _imports(path):
    """(importing module, imported module, imported name or None) for every import in one file."""
    name = _module_name(path)
    package = name if path.name == "__init__.py" else name.rsplit(".", 1)[0]
    for node in ast.walk(ast.parse(path.read_text())):
        if isinstance(node, ast.Import):
            for alias in node.names:
                if alias.name.startswith("specan"):
                    yield name, alias.name, None
        elif isinstance(node, ast.ImportFrom):
            if node.level:
                base = package.split(".")[: len(package.split(".")) - (node.level - 1)]
                target = ".".join(base + ([node.module] if node.module else []))
            elif node.module and node.module.startswith("specan"):
                target = node.module
            else:
                continue
            for alias in node.names:
                sub = f"{target}.{alias.name}"
                if _is_module(sub):
                    yield name, sub, None
                else:
                    yield name, target, alias.name


def _all_imports():
    return [imp for path in sorted(PACKAGE.rglob("*.py")) for imp in _imports(path)]


def test_the_walker_sees_the_package():
    # guards the checks below against passing on an empty walk
    edges = {(a, b) for a, b, _ in _all_imports()}
    assert ("specan.velocity", "specan.doppler") in edges
    assert ("specan.pipeline", "specan.errors") in edges
    assert len({a for a, _ in edges}) > 30


def _cycles(edges):
    graph = {}
    for a, b in edges:
        if a != b:
            graph.setdefault(a, set()).add(b)
    found, state, stack = [], {}, []

    def visit(node):
        state[node] = "open"
        stack.append(node)
        for nxt in sorted(graph.get(node, ())):
            if state.get(nxt) == "open":
                found.append(stack[stack.index(nxt):] + [nxt])
            elif nxt not in state:
                visit(nxt)
        stack.pop()
        state[node] = "done"

    for node in sorted(graph):
        if node not in state:
            visit(node)
    return found


def test_cycle_finder_finds_a_cycle():
    assert _cycles({("a", "b"), ("b", "c"), ("c", "a"), ("c", "d")}) == [["a", "b", "c", "a"]]
    assert _cycles({("a", "b"), ("b", "c")}) == []


def test_no_import_cycle():
    # The package itself (``specan``) imports only the reader and the carrier; a stage that
    # imports ``specan.read`` leans on that, not on another stage.
    edges = {(a, b) for a, b, _ in _all_imports()}
    cycles = _cycles(edges)
    assert not cycles, "import cycles: " + "; ".join(" -> ".join(c) for c in cycles)


def test_no_private_name_crosses_modules():
    bad = [f"{a} imports {n} from {b}" for a, b, n in _all_imports()
           if n and n.startswith("_") and not n.startswith("__") and a != b]
    assert not bad, "\n".join(bad)


def test_private_modules_stay_in_their_package():
    bad = []
    for a, b, _ in _all_imports():
        parts = b.split(".")
        if any(p.startswith("_") and not p.startswith("__") for p in parts[1:]):
            home = ".".join(parts[:-1])
            if not (a == home or a.startswith(home + ".")):
                bad.append(f"{a} imports {b}")
    assert not bad, "\n".join(bad)


def test_every_subpackage_is_installed():
    # pyproject.toml lists the packages explicitly (linelists/ is mapped into the package);
    # a subpackage missing there works in an editable install and is absent from a wheel.
    import re

    text = (PACKAGE.parent / "pyproject.toml").read_text()
    listed = set(re.findall(r'"(specan(?:\.[a-z_]+)*)"', re.search(r"packages = \[(.*?)\]", text, re.S).group(1)))
    found = {_module_name(p.parent / "__init__.py") for p in PACKAGE.rglob("__init__.py")}
    assert found, "no package found under specan/"
    assert found <= listed, f"not listed in pyproject.toml packages: {sorted(found - listed)}"


def test_every_data_file_is_installed():
    # package data is listed by pattern; a data file of a new kind (the FITS templates once) is
    # read in an editable install and missing from a wheel.
    import fnmatch
    import re

    text = (PACKAGE.parent / "pyproject.toml").read_text()   # tomllib is 3.11+; we support 3.10
    patterns = re.findall(r'"([^"]+)"', re.search(r'^"specan\.data" = \[(.*?)\]', text, re.M | re.S).group(1))
    files = [p.name for p in (PACKAGE / "data").iterdir() if p.is_file() and not re.match(r".*\.pyc?$", p.name)]
    assert files, "no data file found under specan/data"
    missing = [f for f in files if not any(fnmatch.fnmatch(f, pat) for pat in patterns)]
    assert not missing, f"not matched by pyproject.toml package-data: {missing}"
