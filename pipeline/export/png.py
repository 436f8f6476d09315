"""A minimal PNG writer (8-bit grayscale, no filtering) with numpy and zlib, so previews and
the report's thumbnails need no imaging package. Format: the PNG specification (W3C, second
edition 2003): signature, IHDR, one IDAT of zlib-compressed rows each led by filter byte 0, IEND.
"""
from __future__ import annotations

import struct
import zlib

import numpy as np

SIGNATURE = b"\x89PNG\r\n\x1a\n"


def _chunk(kind: bytes, body: bytes) -> bytes:
    return struct.pack(">I", len(body)) + kind + body + struct.pack(">I", zlib.crc32(kind + body) & 0xFFFFFFFF)


def png_bytes(gray: np.ndarray) -> bytes:
    """A height x width uint8 array (0 black, 255 white) as PNG bytes."""
    gray = np.ascontiguousarray(gray, dtype=np.uint8)
    if gray.ndim != 2 or 0 in gray.shape:
        raise ValueError(f"a PNG needs a non-empty 2-D array, got shape {gray.shape}")
    h, w = gray.shape
    rows = np.zeros((h, w + 1), dtype=np.uint8)
    rows[:, 1:] = gray
    ihdr = struct.pack(">IIBBBBB", w, h, 8, 0, 0, 0, 0)  # 8-bit grayscale, no interlace
    return SIGNATURE + _chunk(b"IHDR", ihdr) + _chunk(b"IDAT", zlib.compress(rows.tobytes(), 6)) + _chunk(b"IEND", b"")


def roll_image(roll: np.ndarray, *, max_width: int = 1200, row_px: int = 2) -> np.ndarray:
    """A time x pitch roll as an image: pitch upwards, time rightwards, louder notes darker on
    white, empty pitch rows above and below the notes cropped; rolls longer than ``max_width``
    frames are shrunk by taking the loudest of each run of frames; each pitch is ``row_px``
    pixels tall."""
    if roll.ndim != 2 or roll.shape[0] == 0:
        return np.full((8, 8), 255, dtype=np.uint8)
    used = np.flatnonzero(roll.max(axis=0))
    if len(used):
        roll = roll[:, max(0, used[0] - 2):used[-1] + 3]
    frames = roll.shape[0]
    if frames > max_width:
        k = -(-frames // max_width)
        pad = np.zeros((-frames % k, roll.shape[1]), dtype=roll.dtype)
        roll = np.concatenate([roll, pad]).reshape(-1, k, roll.shape[1]).max(axis=1)
    img = roll.T[::-1].astype(np.int32)
    img = np.where(img > 0, 150 - img, 255).clip(0, 255).astype(np.uint8)
    return np.repeat(img, row_px, axis=0)
