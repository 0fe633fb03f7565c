"""Imports point one way: a module imports only from modules below it in DESIGN.md's table."""

import ast
from pathlib import Path

PACKAGE = Path(__file__).resolve().parents[1] / "src" / "ebbwatch"

# Rows of the module table, top to bottom (DEVELOPERS.md repeats it).  Same row = same level.
LAYERS = [
    {"cli", "__main__"},
    {"api", "__init__"},
    {"tasks"},
    {"config"},
    {"report"},
    {"outcomes"},
    {"backtest"},
    {"alerts", "explain"},
    {"detect"},
    {"baseline"},
    {"series", "fleet"},
    {"engine"},
    {"store"},
    {"ingest"},
    {"datasets"},
    {"errors", "frames", "textsafe"},
]
LEVEL = {name: i for i, row in enumerate(LAYERS) for name in row}


def unit_of(path: Path) -> str:
    rel = path.relative_to(PACKAGE)
    return rel.parts[0].removesuffix(".py")


def imported_units(path: Path):
    tree = ast.parse(path.read_text())
    rel_parts = path.relative_to(PACKAGE).parts
    for node in ast.walk(tree):
        if isinstance(node, ast.ImportFrom):
            if node.level == 0:
                if node.module and node.module.startswith("ebbwatch"):
                    parts = node.module.split(".")[1:]
                    yield (parts[0] if parts else "__init__"), node.lineno
                continue
            base = list(rel_parts[:-1])[: len(rel_parts) - node.level]
            target = base + (node.module.split(".") if node.module else [])
            if target:
                yield target[0].removesuffix(".py"), node.lineno
            else:
                for alias in node.names:
                    yield alias.name, node.lineno
        elif isinstance(node, ast.Import):
            for alias in node.names:
                if alias.name.startswith("ebbwatch."):
                    yield alias.name.split(".")[1], node.lineno


def test_every_module_is_in_the_table():
    units = {unit_of(p) for p in PACKAGE.rglob("*.py")}
    assert units <= set(LEVEL), f"not in the module table: {units - set(LEVEL)}"


def test_imports_point_down():
    bad = []
    for path in PACKAGE.rglob("*.py"):
        me = unit_of(path)
        for target, line in imported_units(path):
            if target == me or target not in LEVEL:
                continue
            if LEVEL[target] < LEVEL[me] or (LEVEL[target] == LEVEL[me] and me not in ("__init__", "__main__")):
                bad.append(f"{path.relative_to(PACKAGE)}:{line} imports {target}")
    assert not bad, "imports pointing up the module table:\n" + "\n".join(bad)


def test_only_store_speaks_sql():
    import re

    sql = re.compile(r"\b(SELECT|INSERT INTO|CREATE TABLE|DELETE FROM)\b")
    offenders = [str(p.relative_to(PACKAGE)) for p in PACKAGE.rglob("*.py")
                 if "store" not in p.relative_to(PACKAGE).parts[:1] and sql.search(p.read_text())]
    assert not offenders


def test_statistics_touch_no_files_database_or_config():
    for unit in ("series.py", "alerts.py", "baseline", "detect"):
        for path in (PACKAGE / unit).rglob("*.py") if (PACKAGE / unit).is_dir() else [PACKAGE / unit]:
            text = path.read_text()
            for word in ("import duckdb", "from .config", "from ..config", "from .store", "from ..store",
                         "import click", "open(", "os.environ"):
                assert word not in text, f"{path.name} uses {word}"


MAX_MODULE_LINES = 420  # "no source module over ~400 lines" (issue 19)
MAX_CLASS_LINES = 300


def test_modules_and_classes_stay_small():
    big_modules, big_classes = [], []
    for path in PACKAGE.rglob("*.py"):
        text = path.read_text()
        lines = len(text.splitlines())
        if lines > MAX_MODULE_LINES:
            big_modules.append(f"{path.relative_to(PACKAGE)}: {lines} lines")
        for node in ast.walk(ast.parse(text)):
            if isinstance(node, ast.ClassDef) and node.end_lineno - node.lineno + 1 > MAX_CLASS_LINES:
                big_classes.append(f"{path.relative_to(PACKAGE)}: class {node.name}, {node.end_lineno - node.lineno + 1} lines")
    assert not big_modules and not big_classes, "split these:\n" + "\n".join(big_modules + big_classes)
