"""A tiny line-chart writer: numpy raster + zlib PNG, for loss curves and compare plots.

Used when matplotlib is not installed (it is not an engine dependency). The
chart has axes, a light grid, one coloured polyline per series and numeric
tick labels drawn with a built-in 3x5 pixel font; series names go to the
legend strip at the top as coloured swatches followed by their label text.

PNG layout: W3C 2003, "Portable Network Graphics (PNG) Specification
(Second Edition)": signature, IHDR (8-bit RGB), one zlib-compressed IDAT with
filter byte 0 per row, IEND; each chunk carries a CRC-32 of type + data.
"""

import struct
import zlib

import numpy as np

from .errors import SplashdraftError

# 3x5 glyphs, rows top to bottom, 3 bits each (MSB = left column).
_FONT = {
    "0": (7, 5, 5, 5, 7), "1": (2, 6, 2, 2, 7), "2": (7, 1, 7, 4, 7), "3": (7, 1, 7, 1, 7),
    "4": (5, 5, 7, 1, 1), "5": (7, 4, 7, 1, 7), "6": (7, 4, 7, 5, 7), "7": (7, 1, 1, 1, 1),
    "8": (7, 5, 7, 5, 7), "9": (7, 5, 7, 1, 7), ".": (0, 0, 0, 0, 2), "-": (0, 0, 7, 0, 0),
    "+": (0, 2, 7, 2, 0), "e": (0, 7, 7, 4, 7), " ": (0, 0, 0, 0, 0), "_": (0, 0, 0, 0, 7),
    "a": (0, 7, 1, 7, 7), "b": (4, 4, 7, 5, 7), "c": (0, 7, 4, 4, 7), "d": (1, 1, 7, 5, 7),
    "f": (3, 4, 6, 4, 4), "g": (7, 5, 7, 1, 6), "h": (4, 4, 7, 5, 5), "i": (2, 0, 2, 2, 2),
    "k": (4, 5, 6, 5, 5), "l": (6, 2, 2, 2, 7), "m": (0, 7, 7, 5, 5), "n": (0, 6, 5, 5, 5),
    "o": (0, 7, 5, 5, 7), "p": (0, 7, 5, 7, 4), "r": (0, 7, 4, 4, 4), "s": (0, 7, 6, 1, 7),
    "t": (4, 7, 4, 4, 3), "u": (0, 5, 5, 5, 7), "v": (0, 5, 5, 5, 2), "w": (0, 5, 5, 7, 7),
    "x": (0, 5, 2, 2, 5), "y": (5, 5, 7, 1, 6), "z": (0, 7, 2, 4, 7), "j": (1, 0, 1, 5, 7),
    "q": (7, 5, 7, 1, 1), "(": (1, 2, 2, 2, 1), ")": (4, 2, 2, 2, 4), "/": (1, 1, 2, 4, 4),
    "%": (5, 1, 2, 4, 5), "=": (0, 7, 0, 7, 0), ":": (0, 2, 0, 2, 0),
}  # fmt: skip

_COLOURS = ((31, 119, 180), (214, 39, 40), (44, 160, 44), (148, 103, 189), (255, 127, 14), (23, 190, 207))


def png_bytes(image) -> bytes:
    """Encode an (H, W, 3) uint8 RGB array as PNG bytes (see the module docstring)."""
    image = np.ascontiguousarray(image, dtype=np.uint8)
    height, width, _ = image.shape
    raw = np.concatenate([np.zeros((height, 1), np.uint8), image.reshape(height, width * 3)], axis=1)

    def chunk(kind, data) -> bytes:
        body = kind + data
        return struct.pack(">I", len(data)) + body + struct.pack(">I", zlib.crc32(body) & 0xFFFFFFFF)

    header = struct.pack(">IIBBBBB", width, height, 8, 2, 0, 0, 0)
    return (b"\x89PNG\r\n\x1a\n" + chunk(b"IHDR", header)
            + chunk(b"IDAT", zlib.compress(raw.tobytes(), 9)) + chunk(b"IEND", b""))


def _text(image, x, y, text, colour=(0, 0, 0), scale=2):
    for char in text.lower():
        glyph = _FONT.get(char, _FONT[" "])
        for row, bits in enumerate(glyph):
            for col in range(3):
                if bits & (4 >> col):
                    y0, x0 = y + row * scale, x + col * scale
                    image[max(y0, 0):max(y0 + scale, 0), max(x0, 0):max(x0 + scale, 0)] = colour
        x += 4 * scale


def _line(image, x0, y0, x1, y1, colour):
    steps = int(max(abs(x1 - x0), abs(y1 - y0), 1))
    xs = np.rint(np.linspace(x0, x1, steps + 1)).astype(int)
    ys = np.rint(np.linspace(y0, y1, steps + 1)).astype(int)
    height, width, _ = image.shape
    for dx, dy in ((0, 0), (1, 0), (0, 1)):
        ok = (xs + dx >= 0) & (xs + dx < width) & (ys + dy >= 0) & (ys + dy < height)
        image[ys[ok] + dy, xs[ok] + dx] = colour


def _tick(value):
    return f"{value:.3g}"


def line_plot_png(series, path=None, width=720, height=420, log_y=False, x_label="", y_label="") -> bytes:
    """Draw series as a line chart; return the PNG bytes and write them to ``path`` if given.

    Args:
        series: list of (label, xs, ys) with xs, ys 1-D float arrays of equal length.
        log_y: plot log10(y) (non-positive values are dropped).
        x_label, y_label: short axis captions (drawn with the built-in font).

    Raises:
        SplashdraftError: no finite data to draw.
    """
    prepared = []
    for label, xs, ys in series:
        xs, ys = np.asarray(xs, float), np.asarray(ys, float)
        keep = np.isfinite(xs) & np.isfinite(ys) & ((ys > 0) if log_y else True)
        if keep.any():
            prepared.append((label, xs[keep], np.log10(ys[keep]) if log_y else ys[keep]))
    if not prepared:
        raise SplashdraftError("line plot: no finite values to draw; check the series passed in")
    left, right, top, bottom = 80, 20, 40, 50
    image = np.full((height, width, 3), 255, np.uint8)
    x_all = np.concatenate([p[1] for p in prepared])
    y_all = np.concatenate([p[2] for p in prepared])
    x_min, x_max = float(x_all.min()), float(x_all.max())
    y_min, y_max = float(y_all.min()), float(y_all.max())
    if x_max == x_min:
        x_max = x_min + 1.0
    if y_max == y_min:
        y_max = y_min + 1.0
    pad = 0.05 * (y_max - y_min)
    y_min, y_max = y_min - pad, y_max + pad

    def to_px(x, y) -> tuple[float | np.ndarray, float | np.ndarray]:
        px = left + (x - x_min) / (x_max - x_min) * (width - left - right)
        py = height - bottom - (y - y_min) / (y_max - y_min) * (height - top - bottom)
        return px, py

    for k in range(6):
        gx = x_min + k * (x_max - x_min) / 5
        gy = y_min + k * (y_max - y_min) / 5
        px, _ = to_px(gx, y_min)
        _, py = to_px(x_min, gy)
        image[top:height - bottom, int(px)] = (225, 225, 225)
        image[int(py), left:width - right] = (225, 225, 225)
        _text(image, int(px) - 12, height - bottom + 8, _tick(gx))
        _text(image, 4, int(py) - 5, _tick(10**gy if log_y else gy))
    image[top:height - bottom, left] = 0
    image[height - bottom, left:width - right] = 0
    _text(image, width // 2 - 4 * len(x_label), height - 18, x_label)
    _text(image, 4, 8, y_label + (" (log)" if log_y else ""))
    legend_x = left + 160
    for index, (label, xs, ys) in enumerate(prepared):
        colour = _COLOURS[index % len(_COLOURS)]
        px, py = to_px(xs, ys)
        if len(px) == 1:
            image[int(py[0]) - 1:int(py[0]) + 2, int(px[0]) - 1:int(px[0]) + 2] = colour
        for k in range(len(px) - 1):
            _line(image, px[k], py[k], px[k + 1], py[k + 1], colour)
        image[10:20, legend_x:legend_x + 14] = colour
        _text(image, legend_x + 18, 10, label)
        legend_x += 18 + 8 * len(label) + 20
    data = png_bytes(image)
    if path is not None:
        with open(path, "wb") as handle:
            handle.write(data)
    return data
