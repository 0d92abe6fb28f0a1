"""Files that readers may open while they are written: write to a temporary name, then rename."""

import json
import os
from pathlib import Path


def write_json(path: Path, payload: dict) -> None:
    """Write then rename, so a reader never sees half a file."""
    tmp = path.with_suffix(path.suffix + ".tmp")
    tmp.write_text(json.dumps(payload, indent=2, default=float) + "\n")
    os.replace(tmp, path)
