"""JSON output: one array, an object per input structure."""
from __future__ import annotations

import json
from typing import Iterable


def to_json(results: Iterable, indent: int | None = 2) -> str:
    return json.dumps([r.to_dict() for r in results], indent=indent, allow_nan=False)
