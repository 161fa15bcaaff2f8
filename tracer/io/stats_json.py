"""Statistics JSON files, written atomically (`tracer.io.atomic`: temporary file, then rename)."""
import json
import math
from pathlib import Path

from tracer.io.atomic import atomic_open


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
    with atomic_open(path, "w") as handle:
        json.dump(_clean(data), handle, indent=2, allow_nan=False)
        handle.write("\n")
    return path
