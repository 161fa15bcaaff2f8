"""Statistics JSON files, written atomically (temporary file, then rename)."""
import json
import math
import os
import tempfile
from pathlib import Path


def _clean(value):
    """JSON has no inf/NaN: write them as null so every reader can load the file."""
    if isinstance(value, float) and not math.isfinite(value):
        return None
    if isinstance(value, dict):
        return {str(k): _clean(v) for k, v in value.items()}
    if isinstance(value, list | tuple):
        return [_clean(v) for v in value]
    if hasattr(value, "item"):           # numpy scalars
        return _clean(value.item())
    return value


def write_json(path, data: dict) -> Path:
    path = Path(path)
    fd, tmp = tempfile.mkstemp(suffix=".json", dir=path.parent or ".")
    try:
        with os.fdopen(fd, "w") as handle:
            json.dump(_clean(data), handle, indent=2, allow_nan=False)
            handle.write("\n")
        os.replace(tmp, path)
    finally:
        if os.path.exists(tmp):
            os.remove(tmp)
    return path
