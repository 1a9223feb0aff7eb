"""Reading images and turning them into graph inputs."""
from __future__ import annotations

from pathlib import Path

import numpy as np

from speedbench.errors import UserError


def read_image(path) -> np.ndarray:
    """Read an image file as uint8 RGB [H, W, 3]; a corrupt or unreadable file is a UserError."""
    from PIL import Image, UnidentifiedImageError

    path = Path(path)
    try:
        with Image.open(path) as im:
            im.load()
            return np.asarray(im.convert("RGB"), dtype=np.uint8).copy()
    except FileNotFoundError:
        raise UserError(f"{path}: image file not found") from None
    except (UnidentifiedImageError, OSError, SyntaxError, ValueError) as exc:
        raise UserError(f"{path}: unreadable or corrupt image ({type(exc).__name__})") from None


def to_input(image: np.ndarray) -> np.ndarray:
    """uint8 [H, W, 3] RGB -> float32 [3, H, W] in [0, 1] (the exported graphs' `image` input)."""
    if image.ndim != 3 or image.shape[2] != 3:
        raise ValueError(f"expected an [H, W, 3] image, got shape {image.shape}")
    return np.ascontiguousarray(image.transpose(2, 0, 1), dtype=np.float32) / np.float32(255.0)
