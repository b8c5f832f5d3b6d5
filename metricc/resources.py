"""Where metricc's own files are (no heavy imports)."""
from __future__ import annotations

from pathlib import Path


def template_dir() -> Path:
    """The Jinja templates: inside the installed package, or at the top of a checkout."""
    here = Path(__file__).resolve().parent
    installed = here / "templates"
    return installed if installed.is_dir() else here.parent / "templates"
