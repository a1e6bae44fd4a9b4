"""core/ must never import Qt (house style rule 1)."""

import subprocess
import sys


def test_importing_core_loads_no_qt_module():
    code = (
        "import sys, pkgutil, importlib\n"
        "import gyrometer.core as c\n"
        "for m in pkgutil.iter_modules(c.__path__):\n"
        "    importlib.import_module('gyrometer.core.' + m.name)\n"
        "bad = sorted(n for n in sys.modules if n.split('.')[0] in "
        "('PySide6', 'PyQt5', 'PyQt6', 'PySide2', 'pyqtgraph', 'shiboken6'))\n"
        "print(','.join(bad))\n"
    )
    out = subprocess.run([sys.executable, "-c", code], capture_output=True,
                         text=True, check=True)
    assert out.stdout.strip() == ""
