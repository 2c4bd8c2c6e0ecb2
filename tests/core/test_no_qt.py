"""core/ must stay Qt-free: importing all of it loads no PySide6 or pyqtgraph."""
import json
import pkgutil
import subprocess
import sys
from pathlib import Path

import core


def test_core_imports_no_qt():
    names = [m.name for m in pkgutil.walk_packages(core.__path__, prefix="core.") if not m.name.endswith("__main__")]
    code = (
        "import importlib, json, sys\n"
        f"for name in {names!r}:\n"
        "    importlib.import_module(name)\n"
        "bad = sorted(m for m in sys.modules if m.split('.')[0] in ('PySide6', 'pyqtgraph', 'shiboken6'))\n"
        "print(json.dumps(bad))\n"
    )
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True,
                         cwd=Path(core.__file__).parent.parent)
    assert json.loads(out.stdout) == []
    assert len(names) >= 5
