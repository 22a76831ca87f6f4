"""Where a data set named on the command line or in the window actually is."""

from __future__ import annotations

from pathlib import Path


def resolve_dataset_path(path: str | Path) -> Path:
    """The path as given, or a bundled demo set by name (``bottle-caps``) when no such path exists."""
    p = Path(path)
    if p.exists():
        return p
    here = Path(__file__).resolve().parent.parent
    for base in (Path.cwd() / "demo_sets", here.parent / "demo_sets", here / "demo_sets"):
        if (base / p).is_dir():
            return base / p
    return p
