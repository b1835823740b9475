"""The bundled example requests (``openapi/examples/`` in the repository).

An installed wheel carries them as ``service/examples``; a source checkout reads them from
``openapi/examples`` beside the package.
"""

from __future__ import annotations

import json
from functools import cache
from pathlib import Path
from typing import Any

__all__ = ["example_path", "list_examples", "load_example"]


def _folders() -> list[Path]:
    here = Path(__file__).resolve().parent.parent
    return [here / "examples", here.parent / "openapi" / "examples"]


def example_path(name: str) -> Path:
    """Return the path of the bundled example ``name`` (e.g. ``"design_request.json"``)."""
    for folder in _folders():
        candidate = folder / name
        if candidate.is_file():
            return candidate
    raise FileNotFoundError(f"bundled example {name!r} is missing from this installation")


def list_examples() -> list[str]:
    """Return the file names of the bundled example requests (``*.json``), sorted."""
    for folder in _folders():
        if folder.is_dir():
            return sorted(p.name for p in folder.glob("*.json") if p.is_file())
    return []


@cache
def _load(name: str) -> str:
    return example_path(name).read_text(encoding="utf-8")


def load_example(name: str) -> dict[str, Any]:
    """Return a fresh copy of the bundled example ``name`` as parsed JSON."""
    parsed: dict[str, Any] = json.loads(_load(name))
    return parsed
