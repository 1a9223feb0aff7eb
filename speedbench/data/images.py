"""Reading images and turning them into graph inputs."""
from __future__ import annotations

import struct
import warnings
from pathlib import Path

import numpy as np

from speedbench.errors import UserError

# Largest image decoded, in pixels (width x height); the profile key [dataset] max_pixels.
# 40 MP holds an 8K frame (7680 x 4320 = 33 MP); decoded RGB it is 120 MB, as the float
# graph input 480 MB. A file whose header claims more (a "decompression bomb") is refused
# by its header, before any pixel is decoded.
DEFAULT_MAX_PIXELS = 40_000_000


def read_image(path, max_pixels: int = DEFAULT_MAX_PIXELS) -> np.ndarray:
    """Read an image file as uint8 RGB [H, W, 3]; a corrupt, unreadable or too large file is a UserError."""
    from PIL import Image, UnidentifiedImageError

    path = Path(path)
    try:
        with warnings.catch_warnings():
            # PIL warns above its own limit; ours (max_pixels) is checked right below instead.
            warnings.simplefilter("ignore", Image.DecompressionBombWarning)
            im = Image.open(path)
        with im:
            w, h = im.size
            if w * h > max_pixels:
                raise UserError(f"{path}: image is {w}x{h} = {w * h} pixels, above the limit of {max_pixels} "
                                f"(profile key dataset.max_pixels); refused")
            im.load()
            return np.asarray(im.convert("RGB"), dtype=np.uint8).copy()
    except FileNotFoundError:
        raise UserError(f"{path}: image file not found") from None
    except Image.DecompressionBombError as exc:
        # PIL's own guard (twice its MAX_IMAGE_PIXELS) fired while reading the header.
        raise UserError(f"{path}: image header claims more pixels than allowed ({exc}); refused") from None
    except (UnidentifiedImageError, OSError, SyntaxError, ValueError, EOFError, MemoryError,
            OverflowError, IndexError, TypeError, struct.error) as exc:
        # Decoders of damaged files raise many kinds; each is a corrupt file, not a bug of ours.
        raise UserError(f"{path}: unreadable or corrupt image ({type(exc).__name__})") from None


def to_input(image: np.ndarray) -> np.ndarray:
    """uint8 [H, W, 3] RGB -> float32 [3, H, W] in [0, 1] (the exported graphs' `image` input)."""
    if image.ndim != 3 or image.shape[2] != 3:
        raise ValueError(f"expected an [H, W, 3] image, got shape {image.shape}")
    return np.ascontiguousarray(image.transpose(2, 0, 1), dtype=np.float32) / np.float32(255.0)
