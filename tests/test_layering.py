"""The analysis layer is pure computation: importing every module of it loads no web framework.

Reference: the interpreter's own module table (``sys.modules``) in a fresh subprocess.
"""
import subprocess
import sys

SCRIPT = r"""
import importlib, pkgutil, sys
import analysis
names = [m.name for m in pkgutil.walk_packages(analysis.__path__, "analysis.")]
for n in names:
    importlib.import_module(n)
bad = sorted({m.split('.')[0] for m in sys.modules} & {"dash", "flask", "werkzeug"})
print(len(names), ",".join(bad))
"""


def test_analysis_imports_no_web_framework():
    out = subprocess.run([sys.executable, "-c", SCRIPT], capture_output=True, text=True,
                         check=True).stdout.split()
    n_modules, bad = int(out[0]), out[1] if len(out) > 1 else ""
    assert n_modules >= 20          # every analysis module was imported
    assert bad == "", f"analysis/ imports {bad}"
