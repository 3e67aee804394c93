"""The wall between the two worlds: analysis/ never imports Django, Celery or emicase."""

import ast
import subprocess
import sys
from pathlib import Path

ANALYSIS = Path(__file__).resolve().parents[2] / "analysis"
FORBIDDEN = ("django", "celery", "kombu", "rest_framework", "emicase")


def _imported_roots(path: Path) -> set[str]:
    tree = ast.parse(path.read_text(encoding="utf-8"), filename=str(path))
    roots = set()
    for node in ast.walk(tree):
        if isinstance(node, ast.Import):
            roots.update(alias.name.split(".")[0] for alias in node.names)
        elif isinstance(node, ast.ImportFrom) and node.level == 0 and node.module:
            roots.add(node.module.split(".")[0])
    return roots


def test_no_module_of_analysis_imports_the_web_world():
    offenders = {
        str(p.relative_to(ANALYSIS.parent)): sorted(_imported_roots(p) & set(FORBIDDEN))
        for p in ANALYSIS.rglob("*.py")
    }
    offenders = {k: v for k, v in offenders.items() if v}
    assert offenders == {}


def test_the_scan_itself_sees_imports(tmp_path):
    # Guard against a scanner that finds nothing: it must flag a planted import.
    planted = tmp_path / "planted.py"
    planted.write_text("import numpy\nfrom django.db import models\n")
    assert "django" in _imported_roots(planted)


def test_importing_the_whole_engine_loads_no_web_module():
    code = (
        "import sys, pkgutil, importlib, analysis\n"
        "for m in pkgutil.iter_modules(analysis.__path__):\n"
        "    importlib.import_module('analysis.' + m.name)\n"
        f"bad = sorted(n for n in sys.modules if n.split('.')[0] in {FORBIDDEN!r})\n"
        "print(','.join(bad))\n"
    )
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, cwd=ANALYSIS.parent, check=True)
    assert out.stdout.strip() == ""
