"""What the image scripts share: a screenshot saved small for README."""

from __future__ import annotations

from pathlib import Path

from PIL import Image


def save_small_png(shot: Path, image: Path) -> None:
    """Save the screenshot ``shot`` as ``image`` with a 256-colour palette (a small file)."""
    with Image.open(shot) as opened:
        palette = opened.convert("RGB").quantize(colors=256, method=Image.Quantize.FASTOCTREE)
        palette.save(image, optimize=True)
