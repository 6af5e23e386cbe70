"""Reading a datasheet page: PNG or JPEG bytes -> an ink array.

Contract (shared with the web front end, issue 12)::

    class DigitiseInputError(fitter.errors.InputError)   # always carries a field, e.g. "image",
                                                          # "marks[2].value", "seed", "curves[1].grid_v"
    MAX_IMAGE_BYTES = 20_000_000        # refused above, with a clear message
    MAX_PIXELS = 40_000_000

    @dataclass(frozen=True)
    class PlotImage:
        ink: np.ndarray      # float32, shape (height, width): 0 = paper, 1 = darkest ink; coloured
                             # lines count as ink (e.g. 1 - min over RGB after background normalisation)
        width: int
        height: int
        format: str          # "png" or "jpeg"

    def load_image(data: bytes, name: str = "image") -> PlotImage
        # PNG or JPEG from bytes (Pillow, with its decompression-bomb guard set to MAX_PIXELS);
        # anything else, truncated files, too large -> DigitiseInputError(field="image") naming `name`.

A JPEG's EXIF orientation is applied (as browsers apply it), so pixel positions are those of
the page as it is shown.  Colour, grey, palette, 16-bit and transparent images are read
(transparency over white paper).

How the ink is found.  A scanned or photographed page has paper that is not white and not
even (grey paper, a shadow across a photograph), and lines that are not black (coloured
curves, JPEG ringing).  So the paper level is estimated per colour channel and per region:
the 90th percentile of blocks of about 64 px (a plot page is mostly paper, so a high
percentile of a block is its paper), spread to the neighbouring blocks by a maximum (a block
covered by a legend or a thick label takes its neighbours' paper), then interpolated back to
every pixel.  Each channel is divided by its paper level; a pixel's darkness is one minus the
smallest normalised channel (so a red or a blue line is as dark as a black one), and it is
scaled so that the page's darkest ink (the 99.9th percentile of the darkness, at least 0.25)
is 1.
"""

from __future__ import annotations

import io
import warnings
from dataclasses import dataclass

import numpy as np

from ..errors import InputError

__all__ = ["DigitiseInputError", "MAX_IMAGE_BYTES", "MAX_PIXELS", "MIN_SIDE", "PlotImage", "load_image"]

#: Largest image file accepted [bytes].
MAX_IMAGE_BYTES = 20_000_000
#: Largest image accepted [pixels], checked from the header before any pixel is decoded.
MAX_PIXELS = 40_000_000
#: Smallest width and height accepted [pixels]: nothing smaller can carry a readable plot.
MIN_SIDE = 32

_PNG = b"\x89PNG\r\n\x1a\n"
_JPEG = b"\xff\xd8\xff"
#: side of the blocks over which the paper level is estimated [px]
_BLOCK = 64


class DigitiseInputError(InputError):
    """Something given to the digitiser is wrong; ``field`` says what ("image", "seed",
    "marks[2].value", "curves[1].grid_v", ...)."""

    def __init__(self, message: str, *, field: str, **kw):
        super().__init__(message, field=field, **kw)


@dataclass(frozen=True)
class PlotImage:
    """A page as ink: ``ink[row, column]`` is 0 on paper and 1 on the darkest ink.

    Attributes
    ----------
    ink : ndarray of float32, shape (height, width)
    width, height : int
        Pixels.
    format : str
        ``"png"`` or ``"jpeg"``.
    """

    ink: np.ndarray
    width: int
    height: int
    format: str


def _bad(name: str, message: str) -> DigitiseInputError:
    return DigitiseInputError(f"{name}: {message}", field="image")


def load_image(data: bytes, name: str = "image") -> PlotImage:
    """Decode a PNG or JPEG page into a :class:`PlotImage`.

    Parameters
    ----------
    data : bytes
        The file's bytes.
    name : str
        What to call the image in messages (its file name).

    Raises
    ------
    DigitiseInputError
        ``field="image"``: not bytes, empty, larger than :data:`MAX_IMAGE_BYTES`, neither PNG
        nor JPEG, truncated or corrupt, more than :data:`MAX_PIXELS` pixels, or smaller than
        :data:`MIN_SIDE` pixels a side.
    """
    name = str(name)[:200] or "image"
    if isinstance(data, (bytearray, memoryview)):
        data = bytes(data)
    if not isinstance(data, bytes):
        raise _bad(name, f"expected the image file's bytes, got {type(data).__name__}")
    if not data:
        raise _bad(name, "the file is empty")
    if len(data) > MAX_IMAGE_BYTES:
        raise _bad(name, f"the file is {len(data) / 1e6:.1f} MB; at most {MAX_IMAGE_BYTES / 1e6:.0f} MB is accepted "
                         "(save the page as a smaller PNG or JPEG)")
    if data.startswith(_PNG):
        fmt = "png"
    elif data.startswith(_JPEG):
        fmt = "jpeg"
    else:
        raise _bad(name, "not a PNG or JPEG image (its first bytes are neither format's signature)")

    from PIL import Image, ImageOps

    try:
        with warnings.catch_warnings():
            warnings.simplefilter("error", Image.DecompressionBombWarning)
            img = Image.open(io.BytesIO(data), formats=["PNG" if fmt == "png" else "JPEG"])
            w, h = img.size
            if w * h > MAX_PIXELS:
                raise _bad(name, f"the image is {w} x {h} pixels ({w * h / 1e6:.1f} megapixels); at most "
                                 f"{MAX_PIXELS / 1e6:.0f} megapixels are accepted")
            if min(w, h) < MIN_SIDE:
                raise _bad(name, f"the image is {w} x {h} pixels; a plot needs at least {MIN_SIDE} pixels a side")
            img.load()
            # as browsers show it: a photograph's EXIF orientation applied
            img = ImageOps.exif_transpose(img)
            rgb = _as_uint8(img)
    except DigitiseInputError:
        raise
    except (Image.DecompressionBombError, Image.DecompressionBombWarning):
        raise _bad(name, f"the image has too many pixels (at most {MAX_PIXELS / 1e6:.0f} megapixels are accepted)") \
            from None
    except MemoryError:
        raise _bad(name, "not enough memory to decode this image") from None
    except Exception as e:  # Pillow reports corrupt input with many exception types
        raise _bad(name, f"the {fmt.upper()} file cannot be decoded: it is truncated or corrupt "
                         f"({type(e).__name__}: {str(e)[:120]})") from None
    ink = ink_from_rgb(rgb)
    return PlotImage(ink=ink, width=int(ink.shape[1]), height=int(ink.shape[0]), format=fmt)


def _as_uint8(img) -> np.ndarray:
    """uint8 (h, w) grey or (h, w, 3) colour, transparency composited over white paper."""
    from PIL import Image

    mode = img.mode
    if mode in ("I", "I;16", "I;16B", "I;16L", "F"):
        a = np.asarray(img, dtype=np.float32)
        top = 65535.0 if (mode.startswith("I;16") or float(a.max(initial=0)) > 255) else 255.0
        return (np.clip(a / top, 0, 1) * 255.0 + 0.5).astype(np.uint8)
    if mode in ("L", "RGB"):
        return np.asarray(img, dtype=np.uint8)
    if mode in ("RGBA", "LA", "PA", "La", "RGBa") or (mode == "P" and "transparency" in img.info):
        rgba = img.convert("RGBA")
        paper = Image.new("RGBA", rgba.size, (255, 255, 255, 255))
        return np.asarray(Image.alpha_composite(paper, rgba).convert("RGB"), dtype=np.uint8)
    return np.asarray(img.convert("RGB"), dtype=np.uint8)


def _interp_matrix(n_out: int, n_blocks: int, block: int) -> np.ndarray:
    """(n_out, n_blocks) weights of linear interpolation between block centres (held flat
    beyond the first and last centre)."""
    centres = (np.arange(n_blocks) + 0.5) * block - 0.5
    pos = np.clip(np.arange(n_out, dtype=np.float64), centres[0], centres[-1])
    m = np.zeros((n_out, n_blocks), dtype=np.float32)
    if n_blocks == 1:
        m[:, 0] = 1.0
        return m
    j = np.clip(np.searchsorted(centres, pos, side="right") - 1, 0, n_blocks - 2)
    t = (pos - centres[j]) / block
    rows = np.arange(n_out)
    m[rows, j] = 1.0 - t
    m[rows, j + 1] = t
    return m


def _paper(channel: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """The paper level of one uint8 channel as (row weights, block levels, column weights):
    the level at every pixel is ``rows @ levels @ cols.T`` (see the module's notes)."""
    from scipy.ndimage import maximum_filter

    h, w = channel.shape
    nby, nbx = max(1, h // _BLOCK), max(1, w // _BLOCK)
    by, bx = h // nby, w // nbx
    blocks = channel[: nby * by, : nbx * bx].reshape(nby, by, nbx, bx).transpose(0, 2, 1, 3)
    # a strided sample of each block is plenty for a percentile
    sample = blocks[:, :, ::2, ::2].reshape(nby, nbx, -1)
    level = np.percentile(sample, 90, axis=2).astype(np.float32) / 255.0
    level = maximum_filter(level, size=3, mode="nearest")
    level = np.maximum(level, 0.15)
    # bilinear between block centres
    return _interp_matrix(h, nby, by), level, _interp_matrix(w, nbx, bx)


#: rows handled at a time (keeps the float temporaries of a large page small)
_STRIP = 256


def ink_from_rgb(rgb: np.ndarray) -> np.ndarray:
    """Ink (0 paper .. 1 darkest), float32 (h, w), of a uint8 (h, w) grey or (h, w, 3) image."""
    rgb = np.asarray(rgb)
    if rgb.dtype != np.uint8:
        rgb = (np.clip(np.asarray(rgb, dtype=np.float32), 0, 1) * 255.0 + 0.5).astype(np.uint8)
    channels = [rgb] if rgb.ndim == 2 else [rgb[:, :, c] for c in range(rgb.shape[2])][:3]
    h, w = channels[0].shape
    papers = [_paper(ch) for ch in channels]
    ink = np.empty((h, w), dtype=np.float32)
    for r0 in range(0, h, _STRIP):
        r1 = min(h, r0 + _STRIP)
        norm = None
        for ch, (rows, level, cols) in zip(channels, papers):
            paper = rows[r0:r1] @ level @ cols.T
            v = np.minimum(ch[r0:r1].astype(np.float32) * (1.0 / 255.0) / paper, 1.0)
            norm = v if norm is None else np.minimum(norm, v, out=norm)
        np.subtract(1.0, norm, out=ink[r0:r1])
    top = float(np.percentile(ink[::3, ::3], 99.9))
    ink *= 1.0 / max(top, 0.25)
    np.clip(ink, 0.0, 1.0, out=ink)
    return ink
