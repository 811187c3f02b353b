"""Small SVG figures for the confidential report, written directly (no plotting library).

The report's figures are simple: lines on linear or logarithmic axes, a stacked
bar, a histogram and heat maps. Written as SVG text they cost milliseconds and
need no import of a plotting library (about a second with its fonts and
backends on the release's path); the browser draws them at any zoom.

Every function returns one ``<svg>`` element as text (inputs already validated:
finite numbers from the audit).
"""

from __future__ import annotations

__all__ = ["Axes", "line_chart", "side_by_side", "stack", "png_rgb", "stacked_bar", "histogram", "heatmap", "COLOURS"]

import base64
import html
import math
import struct
import zlib

import numpy as np

#: Series colours (a plain qualitative set).
COLOURS = ("#222222", "#c0392b", "#2471a3", "#239b56", "#b9770e", "#7d3c98", "#566573")
_FONT = "font-family=\"DejaVu Sans, Arial, sans-serif\""
#: Anchor colours of the sequential scale (dark blue to yellow) and the diverging one (blue, white, red).
_SEQUENTIAL = ((0.0, (68, 1, 84)), (0.25, (59, 82, 139)), (0.5, (33, 145, 140)), (0.75, (94, 201, 98)),
               (1.0, (253, 231, 37)))
_DIVERGING = ((0.0, (33, 102, 172)), (0.25, (146, 197, 222)), (0.5, (247, 247, 247)), (0.75, (244, 165, 130)),
              (1.0, (178, 24, 43)))


def _esc(text) -> str:
    return html.escape(str(text), quote=True)


def _num(x: float) -> str:
    return f"{x:.1f}"


def _tick_text(x: float) -> str:
    if x == 0:
        return "0"
    if abs(x) >= 1e4 or abs(x) < 1e-3:
        e = int(math.floor(math.log10(abs(x))))
        m = x / 10 ** e
        return f"{'-' if m < 0 else ''}1e{e}" if abs(abs(m) - 1) < 1e-9 else f"{m:g}e{e}"
    return f"{x:g}"


def _nice_ticks(lo: float, hi: float, n: int = 6) -> list:
    """About ``n`` round numbers (1, 2, 5 times a power of ten) covering ``[lo, hi]``."""
    if not hi > lo:
        return [lo]
    raw = (hi - lo) / max(n, 1)
    mag = 10 ** math.floor(math.log10(raw))
    step = next(m * mag for m in (1, 2, 5, 10) if m * mag >= raw)
    first = math.ceil(lo / step - 1e-9) * step
    return [first + i * step for i in range(int((hi - first) / step + 1e-9) + 1)]


class Axes:
    """A plot area inside an SVG of ``width`` x ``height`` pixels, with linear or log-10 axes.

    Parameters
    ----------
    x_range, y_range : (float, float)
        Data limits (positive for a log axis).
    """

    def __init__(self, width, height, x_range, y_range, *, xlog=False, ylog=False, margins=(62, 16, 30, 48)):
        self.width, self.height = width, height
        left, right, top, bottom = margins
        self.x0, self.x1 = left, width - right
        self.y0, self.y1 = height - bottom, top  # y grows downwards in SVG
        self.xlog, self.ylog = xlog, ylog
        self.xr = tuple(math.log10(v) for v in x_range) if xlog else tuple(x_range)
        self.yr = tuple(math.log10(v) for v in y_range) if ylog else tuple(y_range)
        if self.xr[1] <= self.xr[0]:
            self.xr = (self.xr[0] - 0.5, self.xr[0] + 0.5)
        if self.yr[1] <= self.yr[0]:
            self.yr = (self.yr[0] - 0.5, self.yr[0] + 0.5)
        self.parts = []

    def px(self, x):
        x = np.log10(x) if self.xlog else np.asarray(x, dtype=np.float64)
        return self.x0 + (x - self.xr[0]) / (self.xr[1] - self.xr[0]) * (self.x1 - self.x0)

    def py(self, y):
        y = np.log10(y) if self.ylog else np.asarray(y, dtype=np.float64)
        return self.y0 + (y - self.yr[0]) / (self.yr[1] - self.yr[0]) * (self.y1 - self.y0)

    def _ticks(self, log, r):
        if log:
            return [10.0 ** e for e in range(math.ceil(r[0] - 1e-9), math.floor(r[1] + 1e-9) + 1)]
        return [t for t in _nice_ticks(r[0], r[1]) if r[0] - 1e-9 <= t <= r[1] + 1e-9]

    def frame(self, title="", xlabel="", ylabel="", grid=True, yticks=True):
        """Axes lines, ticks, grid and labels."""
        p = self.parts
        for t in self._ticks(self.xlog, self.xr):
            x = float(self.px(t))
            if grid:
                p.append(f'<line x1="{_num(x)}" y1="{self.y1}" x2="{_num(x)}" y2="{self.y0}" stroke="#e3e3e3"/>')
            p.append(f'<text x="{_num(x)}" y="{self.y0 + 14}" font-size="10" text-anchor="middle" {_FONT}>'
                     f"{_esc(_tick_text(t))}</text>")
        for t in (self._ticks(self.ylog, self.yr) if yticks else ()):
            y = float(self.py(t))
            if grid:
                p.append(f'<line x1="{self.x0}" y1="{_num(y)}" x2="{self.x1}" y2="{_num(y)}" stroke="#e3e3e3"/>')
            p.append(f'<text x="{self.x0 - 4}" y="{_num(y + 3.5)}" font-size="10" text-anchor="end" {_FONT}>'
                     f"{_esc(_tick_text(t))}</text>")
        p.append(f'<rect x="{self.x0}" y="{self.y1}" width="{self.x1 - self.x0}" height="{self.y0 - self.y1}" '
                 'fill="none" stroke="#444"/>')
        mid_x = (self.x0 + self.x1) / 2
        if title:
            p.append(f'<text x="{_num(mid_x)}" y="{self.y1 - 8}" font-size="12" text-anchor="middle" {_FONT}>'
                     f"{_esc(title)}</text>")
        if xlabel:
            p.append(f'<text x="{_num(mid_x)}" y="{self.y0 + 32}" font-size="11" text-anchor="middle" {_FONT}>'
                     f"{_esc(xlabel)}</text>")
        if ylabel:
            mid_y = (self.y0 + self.y1) / 2
            p.append(f'<text transform="translate(14,{_num(mid_y)}) rotate(-90)" font-size="11" '
                     f'text-anchor="middle" {_FONT}>{_esc(ylabel)}</text>')

    def line(self, x, y, colour, dash="", width=1.6):
        """A polyline through the points (already restricted to the axes' range)."""
        if len(x) == 0:
            return
        xs, ys = self.px(np.asarray(x, dtype=np.float64)), self.py(np.asarray(y, dtype=np.float64))
        pts = " ".join(f"{a:.1f},{b:.1f}" for a, b in zip(xs.tolist(), ys.tolist()))
        style = f' stroke-dasharray="{dash}"' if dash else ""
        self.parts.append(f'<polyline points="{pts}" fill="none" stroke="{colour}" stroke-width="{width}"{style}/>')

    def legend(self, entries, where="top right"):
        """``entries``: (label, colour, dash) in a box in a corner of the plot area (``"top right"``,
        ``"bottom left"``, ``"bottom right"``)."""
        if not entries:
            return
        w = 14 + 6.2 * max(len(str(e[0])) for e in entries) + 24
        h = 14 * len(entries) + 6
        x = self.x0 + 6 if "left" in where else self.x1 - w - 6
        y = self.y1 + 6 if "top" in where else self.y0 - h - 6
        self.parts.append(f'<rect x="{_num(x)}" y="{_num(y)}" width="{_num(w)}" height="{14 * len(entries) + 6}" '
                          'fill="#fff" fill-opacity="0.85" stroke="#ccc"/>')
        for i, (label, colour, dash) in enumerate(entries):
            yy = y + 13 + 14 * i
            style = f' stroke-dasharray="{dash}"' if dash else ""
            self.parts.append(f'<line x1="{_num(x + 5)}" y1="{_num(yy - 4)}" x2="{_num(x + 25)}" y2="{_num(yy - 4)}" '
                              f'stroke="{colour}" stroke-width="1.6"{style}/>')
            self.parts.append(f'<text x="{_num(x + 30)}" y="{_num(yy)}" font-size="10" {_FONT}>{_esc(label)}</text>')

    def svg(self) -> str:
        return _svg(self.width, self.height, "".join(self.parts))


def _svg(width, height, body, alt="") -> str:
    return (f'<svg xmlns="http://www.w3.org/2000/svg" width="{width}" height="{height}" '
            f'viewBox="0 0 {width} {height}"><rect width="{width}" height="{height}" fill="#fff"/>{body}</svg>')


def side_by_side(svgs, widths, height) -> str:
    """Several SVG figures in one row (one ``<svg>``)."""
    body, x = [], 0
    for s, w in zip(svgs, widths):
        body.append(f'<g transform="translate({x},0)">{s}</g>')
        x += w
    return _svg(x, height, "".join(body))


def stack(svgs, width, height_each) -> str:
    """Several SVG figures of the same height in one column (one ``<svg>``)."""
    body = "".join(f'<g transform="translate(0,{i * height_each})">{s}</g>' for i, s in enumerate(svgs))
    return _svg(width, height_each * len(svgs), body)


def line_chart(series, *, width=500, height=330, xlog=False, ylog=False, title="", xlabel="", ylabel="",
               legend="top right") -> str:
    """Lines ``(label, x, y, colour, dash)``; points outside a log axis's positive range are left out."""
    kept = []
    for label, x, y, colour, dash in series:
        x, y = np.asarray(x, dtype=np.float64), np.asarray(y, dtype=np.float64)
        ok = np.isfinite(x) & np.isfinite(y)
        if xlog:
            ok &= x > 0
        if ylog:
            ok &= y > 0
        kept.append((label, x[ok], y[ok], colour, dash))
    xs = np.concatenate([k[1] for k in kept]) if kept else np.zeros(0)
    ys = np.concatenate([k[2] for k in kept]) if kept else np.zeros(0)
    xr = (float(xs.min()), float(xs.max())) if len(xs) else ((1.0, 10.0) if xlog else (0.0, 1.0))
    yr = (float(ys.min()), float(ys.max())) if len(ys) else ((1.0, 10.0) if ylog else (0.0, 1.0))
    if ylog:
        yr = (10 ** math.floor(math.log10(yr[0])), 10 ** math.ceil(math.log10(yr[1])))
    if xlog:
        xr = (10 ** math.floor(math.log10(xr[0])), 10 ** math.ceil(math.log10(xr[1])))
    ax = Axes(width, height, xr, yr, xlog=xlog, ylog=ylog)
    ax.frame(title, xlabel, ylabel)
    for label, x, y, colour, dash in kept:
        ax.line(x, y, colour, dash)
    if legend:
        ax.legend([(k[0], k[3], k[4]) for k in kept], legend)
    return ax.svg()


def stacked_bar(segments, *, total, width=600, height=170, title="", xlabel="") -> str:
    """One horizontal bar of ``(label, value, colour)`` segments on ``[0, total]``, legend below."""
    ax = Axes(width, height, (0.0, max(total, sum(v for _, v, _ in segments), 1e-12)), (0.0, 1.0),
              margins=(20, 20, 26, 110))
    ax.frame(title, "", "", grid=False, yticks=False)
    left = 0.0
    for label, value, colour in segments:
        x0, x1 = float(ax.px(left)), float(ax.px(left + value))
        ax.parts.append(f'<rect x="{_num(x0)}" y="{_num(ax.y1 + 4)}" width="{_num(max(x1 - x0, 0.5))}" '
                        f'height="{_num(ax.y0 - ax.y1 - 8)}" fill="{colour}"/>')
        left += value
    ax.parts.append(f'<text x="{_num((ax.x0 + ax.x1) / 2)}" y="{ax.y0 + 30}" font-size="11" text-anchor="middle" '
                    f"{_FONT}>{_esc(xlabel)}</text>")
    for i, (label, value, colour) in enumerate(segments):
        col, row = i % 2, i // 2
        x, y = ax.x0 + col * (ax.x1 - ax.x0) / 2, ax.y0 + 46 + 14 * row
        ax.parts.append(f'<rect x="{_num(x)}" y="{_num(y - 9)}" width="10" height="10" fill="{colour}"/>')
        ax.parts.append(f'<text x="{_num(x + 14)}" y="{_num(y)}" font-size="10" {_FONT}>{_esc(label)}</text>')
    return ax.svg()


def histogram(values, *, bins, marker=None, marker_label="", width=560, height=280, title="", xlabel="",
              ylabel="") -> str:
    """Counts of ``values`` in ``bins`` equal bins, with an optional vertical dashed line at ``marker``."""
    values = np.asarray(values, dtype=np.float64)
    counts, edges = np.histogram(values, bins=bins)
    lo, hi = float(edges[0]), float(edges[-1])
    if marker is not None:
        lo, hi = min(lo, float(marker)), max(hi, float(marker))
    ax = Axes(width, height, (lo, hi), (0.0, float(max(counts.max(), 1)) * 1.05))
    ax.frame(title, xlabel, ylabel)
    for c, e0, e1 in zip(counts.tolist(), edges[:-1].tolist(), edges[1:].tolist()):
        if c:
            x0, x1, y = float(ax.px(e0)), float(ax.px(e1)), float(ax.py(c))
            ax.parts.append(f'<rect x="{_num(x0)}" y="{_num(y)}" width="{_num(max(x1 - x0 - 0.5, 0.5))}" '
                            f'height="{_num(ax.y0 - y)}" fill="#566573"/>')
    if marker is not None:
        x = float(ax.px(marker))
        ax.parts.append(f'<line x1="{_num(x)}" y1="{ax.y1}" x2="{_num(x)}" y2="{ax.y0}" stroke="#c0392b" '
                        'stroke-dasharray="5,3" stroke-width="1.5"/>')
        ax.legend([(marker_label, "#c0392b", "5,3")])
    return ax.svg()


def _rgb_of(t, anchors) -> np.ndarray:
    """RGB bytes (``uint8``, last axis 3) of ``t`` in [0, 1] by linear interpolation between anchors."""
    t = np.clip(np.nan_to_num(np.asarray(t, dtype=np.float64), nan=0.5), 0.0, 1.0)
    pos = np.array([a[0] for a in anchors])
    rgb = np.array([a[1] for a in anchors], dtype=np.float64)
    return np.stack([np.interp(t, pos, rgb[:, c]).round() for c in range(3)], axis=-1).astype(np.uint8)


def _colour_of(t, anchors):
    """Colours of ``t`` in [0, 1] (hex strings), as :func:`_rgb_of`."""
    return [f"#{r:02x}{g:02x}{b:02x}" for r, g, b in _rgb_of(t, anchors).reshape(-1, 3).tolist()]


def png_rgb(pixels: np.ndarray) -> bytes:
    """A PNG file of an ``h x w x 3`` array of bytes (8-bit RGB, no filter, zlib), per the PNG specification
    (W3C, Portable Network Graphics Specification, 2003): signature, IHDR, IDAT, IEND with CRC-32."""
    h, w, _ = pixels.shape

    def chunk(kind: bytes, data: bytes) -> bytes:
        return struct.pack(">I", len(data)) + kind + data + struct.pack(">I", zlib.crc32(kind + data) & 0xFFFFFFFF)

    raw = np.concatenate([np.zeros((h, 1), np.uint8), np.ascontiguousarray(pixels, np.uint8).reshape(h, 3 * w)],
                         axis=1).tobytes()  # filter type 0 before every row
    return (b"\x89PNG\r\n\x1a\n" + chunk(b"IHDR", struct.pack(">IIBBBBB", w, h, 8, 2, 0, 0, 0))
            + chunk(b"IDAT", zlib.compress(raw, 6)) + chunk(b"IEND", b""))


def heatmap(matrix, labels, *, vmin, vmax, diverging=False, size=300, title="") -> str:
    """A square heat map of ``matrix`` (k x k) with value labels and a colour scale; the cells are one
    embedded k x k PNG image (:func:`png_rgb`)."""
    m = np.asarray(matrix, dtype=np.float64)
    k = len(m)
    left, top, bar = 110, 24, 64
    cell = size / max(k, 1)
    width, height = left + size + bar + 2, top + size + 110
    scale = (m - vmin) / (vmax - vmin) if vmax > vmin else np.full_like(m, 0.5)
    parts = [f'<text x="{left + size / 2:.1f}" y="{top - 8}" font-size="12" text-anchor="middle" {_FONT}>'
             f"{_esc(title)}</text>"]
    # the cells as one k x k pixel image, drawn enlarged without smoothing: a few kilobytes at any k
    png = base64.b64encode(png_rgb(_rgb_of(scale, _DIVERGING if diverging else _SEQUENTIAL))).decode("ascii")
    parts.append(f'<image x="{left}" y="{top}" width="{size}" height="{size}" preserveAspectRatio="none" '
                 f'style="image-rendering:pixelated" href="data:image/png;base64,{png}"/>')
    step = max(1, -(-k // 12))
    for i in range(0, k, step):
        c = f"{top + (i + 0.5) * cell + 3:.1f}"
        parts.append(f'<text x="{left - 4}" y="{c}" font-size="9" text-anchor="end" {_FONT}>{_esc(labels[i])}</text>')
        x = f"{left + (i + 0.5) * cell + 3:.1f}"
        parts.append(f'<text transform="translate({x},{top + size + 4}) rotate(-90)" font-size="9" '
                     f'text-anchor="end" {_FONT}>{_esc(labels[i])}</text>')
    # the colour scale
    bx = left + size + 12
    ramp = _colour_of(np.linspace(1, 0, 40), _DIVERGING if diverging else _SEQUENTIAL)
    for i, colour in enumerate(ramp):
        parts.append(f'<rect x="{bx}" y="{top + i * size / 40:.2f}" width="12" height="{size / 40 + 0.3:.2f}" '
                     f'fill="{colour}"/>')
    for frac, value in ((0.0, vmax), (0.5, (vmin + vmax) / 2), (1.0, vmin)):
        label = f"{value:,.0f}" if abs(value) >= 100 else f"{value:.3g}"
        parts.append(f'<text x="{bx + 15}" y="{top + frac * size + 3:.1f}" font-size="9" {_FONT}>'
                     f"{_esc(label)}</text>")
    return _svg(width, height, "".join(parts))
