"""The code's layering, checked by import-linter (contracts in pyproject.toml).

Imports only go downward: commands -> feature libraries (report, check, ladder,
replay, forecast) -> training core (train) -> config -> parts (dist, sync, optim,
telemetry, tasks) -> nn -> primitives; and no package's modules import each other
in a circle.
"""

import shutil
import subprocess
import sys
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]


def test_import_contracts_hold():
    linter = shutil.which("lint-imports", path=str(Path(sys.executable).parent)) or shutil.which("lint-imports")
    assert linter, "import-linter is a test dependency (pip install -e '.[test]')"
    done = subprocess.run([linter], cwd=ROOT, capture_output=True, text=True, env={"PYTHONPATH": str(ROOT / "src"), "PATH": ""})
    assert done.returncode == 0, done.stdout + done.stderr
    assert "2 kept, 0 broken" in done.stdout
