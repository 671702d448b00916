"""The provenance block a plot carries as a PNG text chunk (read side; no other imports)."""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any

__all__ = ["PNG_KEY", "read_png_stamp"]

PNG_KEY = "chainyard:provenance"


def read_png_stamp(path: Path) -> dict[str, Any] | None:
    """The ``{"inputs", "provenance"}`` block a PNG carries (None if it has none)."""
    from PIL import Image

    with Image.open(path) as image:
        text = getattr(image, "text", {}) or image.info
        raw = text.get(PNG_KEY)
    return json.loads(raw) if raw else None
