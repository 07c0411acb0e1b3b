"""The report's figures as standalone HTML: panels of a row drawn by its target (labelled, with their
marks and a colour bar saying what the colours mean), value histograms (inline SVG) and agreement
matrices (a coloured table).  Pictures are PNG made here from numpy arrays; text stays text."""

from __future__ import annotations

import base64
import html
import struct
import zlib
from dataclasses import dataclass
from typing import Sequence

import numpy as np

__all__ = ["Scale", "png_bytes", "compose", "figure_html", "histogram_ranges", "histograms_html", "matrix_html", "stack_rgb"]

# sequential ramp: 0 = red (none), 0.5 = yellow, 1 = blue (all)
_RAMP = np.array([[180, 20, 30], [235, 110, 40], [250, 200, 60], [150, 200, 150], [40, 130, 200]],
                 dtype=np.float64)
# diverging ramp: -1 = blue, 0 = near white, +1 = red
_DIVERGING = np.array([[30, 90, 220], [140, 170, 235], [245, 245, 245], [240, 150, 120], [220, 40, 30]],
                      dtype=np.float64)
_OUTSIDE = 0.55  # background brightness outside the set's mask (a surface's medial wall)


@dataclass(frozen=True)
class Scale:
    """What a figure's colours mean: ``sequential`` from vmin to vmax, or ``diverging`` around 0 (values
    fade into the background as they near 0); ``label`` names the quantity and its unit; ``opacity`` below 1
    lets the anatomy show through colours that fill the whole brain (coverage)."""

    kind: str
    vmin: float
    vmax: float
    label: str
    opacity: float = 1.0

    def ramp(self) -> np.ndarray:
        return _RAMP if self.kind == "sequential" else _DIVERGING

    def position(self, values: np.ndarray) -> np.ndarray:
        """Values as positions in [0, 1] along the ramp."""
        span = self.vmax - self.vmin if self.vmax > self.vmin else 1.0
        return np.clip((values - self.vmin) / span, 0, 1)


def _ramp_colour(pos: np.ndarray, ramp: np.ndarray) -> np.ndarray:
    p = np.nan_to_num(pos) * (len(ramp) - 1)
    lo = np.floor(p).astype(int).clip(0, len(ramp) - 2)
    frac = (p - lo)[..., None]
    return ramp[lo] * (1 - frac) + ramp[lo + 1] * frac


def png_bytes(rgb: np.ndarray) -> bytes:
    """Encode an (H, W, 3) uint8 array as a PNG (8-bit RGB, no interlace), per the PNG spec."""
    rgb = np.ascontiguousarray(rgb, dtype=np.uint8)
    if rgb.ndim != 3 or rgb.shape[2] != 3:
        raise ValueError(f"expected an (H, W, 3) array, got {rgb.shape}")
    h, w, _ = rgb.shape
    raw = b"".join(b"\x00" + rgb[y].tobytes() for y in range(h))  # filter type 0 per scanline

    def chunk(kind: bytes, data: bytes) -> bytes:
        return struct.pack(">I", len(data)) + kind + data + struct.pack(">I", zlib.crc32(kind + data) & 0xFFFFFFFF)

    return (b"\x89PNG\r\n\x1a\n" + chunk(b"IHDR", struct.pack(">IIBBBBB", w, h, 8, 2, 0, 0, 0))
            + chunk(b"IDAT", zlib.compress(raw, 6)) + chunk(b"IEND", b""))


def _grey(background: np.ndarray, lo: float, hi: float) -> np.ndarray:
    """Background as grey RGB in [140, 228] (quiet: the colours stay the loudest thing); white where it has
    nothing (between views, off the surface)."""
    g = np.clip((np.nan_to_num(background, nan=lo) - lo) / (hi - lo if hi > lo else 1.0), 0, 1)
    rgb = (140 + 88 * g)[..., None] * np.ones(3)
    rgb[np.isnan(background)] = 255.0
    return rgb


def compose(values: np.ndarray, background: np.ndarray, inside: np.ndarray, scale: Scale,
            grey_range: tuple[float, float], zoom: int = 1) -> np.ndarray:
    """One panel in RGB: the values in the scale's colours over the background (dimmed outside the mask,
    where ``inside`` is NaN); a diverging scale lets faint values fade into the background."""
    rgb = _grey(background, *grey_range)
    out = np.isnan(inside) & np.isfinite(background)
    rgb[out] *= _OUTSIDE
    v = np.asarray(values, dtype=np.float64)
    shown = np.isfinite(v)
    colour = _ramp_colour(scale.position(v), scale.ramp())
    if scale.kind == "diverging":
        top = max(abs(scale.vmin), abs(scale.vmax)) or 1.0
        alpha = np.clip(np.abs(np.nan_to_num(v)) / top * 1.5 - 0.3, 0, 1)[..., None] * shown[..., None]
    else:
        alpha = shown[..., None].astype(np.float64)
    alpha = alpha * scale.opacity
    rgb = rgb * (1 - alpha) + colour * alpha
    if zoom > 1:
        rgb = np.repeat(np.repeat(rgb, zoom, axis=0), zoom, axis=1)
    return rgb.astype(np.uint8)


def stack_rgb(rows: list[list[np.ndarray]], gap: int = 4) -> np.ndarray:
    """Rows of panels as one RGB picture (white gaps), for callers that want a single image."""
    lines = []
    width = max(sum(p.shape[1] + gap for p in row) for row in rows)
    for row in rows:
        h = max(p.shape[0] for p in row)
        parts = []
        for p in row:
            parts.append(np.pad(p, ((0, h - p.shape[0]), (0, gap), (0, 0)), constant_values=255))
        line = np.concatenate(parts, axis=1)
        lines.append(np.pad(line, ((0, gap), (0, width - line.shape[1]), (0, 0)), constant_values=255))
    return np.concatenate(lines, axis=0)


def _img(rgb: np.ndarray, alt: str) -> str:
    b64 = base64.b64encode(png_bytes(rgb)).decode()
    return (f"<img alt='{html.escape(alt)}' width='{rgb.shape[1]}' height='{rgb.shape[0]}' "
            f"src='data:image/png;base64,{b64}'>")


def _number(x: float) -> str:
    return f"{x:.3g}" if abs(x) < 1000 else f"{x:,.0f}"


def colourbar_html(scale: Scale) -> str:
    """The scale as a bar with its range and midpoint written under it, and what it measures."""
    bar = _ramp_colour(np.linspace(0, 1, 240)[None, :].repeat(14, axis=0), scale.ramp()).astype(np.uint8)
    mid = (scale.vmin + scale.vmax) / 2
    ticks = "".join(f"<span>{html.escape(_number(t))}</span>" for t in (scale.vmin, mid, scale.vmax))
    return (f"<div class='cbar'>{_img(bar, 'colour bar: ' + scale.label)}<div class='ticks'>{ticks}</div>"
            f"<div class='cbar-label'>{html.escape(scale.label)}</div></div>")


def figure_html(rows: list[tuple[str, list[np.ndarray]]], headers: Sequence[tuple[str, ...]], scale: Scale,
                note: str = "") -> str:
    """Rows of panels, each row labelled (a study), each column headed by what it shows and the marks at
    its edges (``(label, left, right[, top, bottom])``: ``L``/``R`` at the sides, ``A``/``P`` or ``S``/``I``
    above and below); the colour bar and a note beneath."""
    head = "<tr><th></th>" + "".join(f"<th>{html.escape(h[0])}</th>" for h in headers) + "</tr>"
    body = []
    for name, panels in rows:
        cells = []
        for header, rgb in zip(headers, panels):
            label, left, right, top, bottom = (tuple(header) + ("", ""))[:5]
            mark = "<span class='mark {}'>{}</span>".format
            picture = (f"<div class='column'>{mark('top', html.escape(top)) if top else ''}"
                       f"{_img(rgb, f'{name}: {label}')}{mark('bottom', html.escape(bottom)) if bottom else ''}</div>")
            cells.append(f"<td><div class='panel'>{mark('left', html.escape(left))}{picture}"
                         f"{mark('right', html.escape(right))}</div></td>")
        body.append(f"<tr><th class='rowname'>{html.escape(name)}</th>{''.join(cells)}</tr>")
    note_html = f"<p class='note'>{html.escape(note)}</p>" if note else ""
    return f"<table class='panels'>{head}{''.join(body)}</table>{colourbar_html(scale)}{note_html}"


def histogram_ranges(samples: dict[tuple[str, str], np.ndarray], spread: float = 8.0
                     ) -> dict[str, tuple[float, float, bool]]:
    """Per stat, the range its histograms share: every value's (min to max over every study), unless that
    is more than ``spread`` times as wide as the middle 99% (a few extreme values would squeeze the rest
    into a bar or two); then the middle 99%, with ``clipped`` True (the cells say how many values lie
    beyond)."""
    out = {}
    for t in sorted({t for _, t in samples}):
        allv = np.concatenate([v for (_, tt), v in samples.items() if tt == t and v.size])
        if not allv.size:
            out[t] = (0.0, 1.0, False)
            continue
        lo, hi = float(allv.min()), float(allv.max())
        plo, phi = (float(x) for x in np.percentile(allv, [0.5, 99.5]))
        clipped = phi > plo and (hi - lo) > spread * (phi - plo)
        if clipped:
            lo, hi = plo, phi
        out[t] = (lo, hi if hi > lo else lo + 1.0, clipped)
    return out


def histograms_html(samples: dict[tuple[str, str], np.ndarray], bins: int = 40) -> str:
    """Per study (rows) and stat (columns), the distribution of the stored values of a sample of maps, on
    one range per stat (see :func:`histogram_ranges`): a study on another scale or with flipped signs
    stands out.  The median is marked; the range, 0 and the median are written beneath; values beyond a
    clipped range are counted in the cell and drawn in the end bars in another colour."""
    studies = sorted({s for s, _ in samples})
    stats = sorted({t for _, t in samples})
    w, h = 240, 70
    ranges = histogram_ranges(samples)
    head = "<tr><th></th>" + "".join(
        f"<th>{html.escape(t)}{' (middle 99% of values)' if ranges[t][2] else ''}</th>" for t in stats) + "</tr>"
    body = []
    for s in studies:
        cells = []
        for t in stats:
            v = samples.get((s, t))
            if v is None or not v.size:
                cells.append("<td class='empty'>-</td>")
                continue
            lo, hi, clipped = ranges[t]
            below, above = int((v < lo).sum()), int((v > hi).sum())
            counts, _ = np.histogram(np.clip(v, lo, hi), bins=bins, range=(lo, hi))
            top = counts.max() or 1
            bw = w / bins

            def bar(i: int, c: int) -> str:
                beyond = " class='beyond'" if (i == 0 and below) or (i == bins - 1 and above) else ""
                return (f"<rect{beyond} x='{i * bw:.1f}' y='{h - c / top * (h - 4):.1f}' "
                        f"width='{bw - 0.5:.1f}' height='{c / top * (h - 4):.1f}'/>")

            bars = "".join(bar(i, c) for i, c in enumerate(counts) if c)
            med = float(np.median(v))
            mx = (min(max(med, lo), hi) - lo) / (hi - lo) * w
            zero = f"<line class='zero' x1='{(0 - lo) / (hi - lo) * w:.1f}' x2='{(0 - lo) / (hi - lo) * w:.1f}' " \
                   f"y1='0' y2='{h}'/>" if lo < 0 < hi else ""
            beyond = (f"<div class='beyond'>{below:,} below, {above:,} above the range (in the end bars)</div>"
                      if below or above else "")
            svg = (f"<svg width='{w}' height='{h}' viewBox='0 0 {w} {h}' role='img'><title>{html.escape(s)}, "
                   f"{html.escape(t)}: median {_number(med)}, values {_number(float(v.min()))} to "
                   f"{_number(float(v.max()))}</title><g class='bars'>{bars}</g>{zero}"
                   f"<line class='median' x1='{mx:.1f}' x2='{mx:.1f}' y1='0' y2='{h}'/></svg>")
            cells.append(f"<td>{svg}<div class='axis'><span>{_number(lo)}</span><span>median {_number(med)}"
                         f"</span><span>{_number(hi)}</span></div>{beyond}</td>")
        body.append(f"<tr><th class='rowname'>{html.escape(s)}</th>{''.join(cells)}</tr>")
    return f"<table class='hist'>{head}{''.join(body)}</table>"


def matrix_html(names: list[str], r: np.ndarray) -> str:
    """A study x study correlation matrix as a table whose cells are coloured by r (blue -1, white 0,
    red +1) and carry the value."""
    scale = Scale("diverging", -1.0, 1.0, "r")
    head = "<tr><th></th>" + "".join(f"<th>{html.escape(n)}</th>" for n in names) + "</tr>"
    body = []
    for i, a in enumerate(names):
        cells = []
        for j in range(len(names)):
            v = r[i, j]
            if i == j or not np.isfinite(v):
                cells.append("<td class='diag'></td>" if i == j else "<td>-</td>")
                continue
            c = _ramp_colour(scale.position(np.array(v)), scale.ramp()).astype(int)
            cells.append(f"<td style='background:rgb({c[0]},{c[1]},{c[2]})'>{v:.2f}</td>")
        body.append(f"<tr><th>{html.escape(a)}</th>{''.join(cells)}</tr>")
    return f"<table class='matrix'>{head}{''.join(body)}</table>"


# the report's own style for figures (read by CheckReport.write_html)
FIGURE_CSS = (
    "table.panels,table.hist,table.matrix{border-collapse:collapse}"
    "table.panels td,table.panels th,table.hist td,table.hist th{border:none;padding:2px 6px;font-size:85%}"
    "th.rowname{text-align:right;white-space:nowrap}"
    ".panel{display:flex;align-items:center;gap:2px}.panel img{border:none;margin:0}"
    ".mark{font-size:100%;font-weight:bold;color:#333;width:1em;text-align:center}"
    ".column{display:flex;flex-direction:column;align-items:center}.mark.top,.mark.bottom{width:auto;line-height:1.1}"
    ".cbar{margin:.4em 0 1em 9em;width:240px}.cbar img{border:none;margin:0}"
    ".ticks{display:flex;justify-content:space-between;font-size:95%}.cbar-label{font-size:95%;color:#333}"
    "p.note{color:#444;font-size:90%;max-width:60em}"
    "table.hist svg .bars{fill:#5a7fb0}table.hist svg .median{stroke:#c03020;stroke-width:1.5}"
    "table.hist svg .zero{stroke:#888;stroke-dasharray:2,2}"
    ".axis{display:flex;justify-content:space-between;font-size:95%;color:#222;width:240px}"
    "table.hist svg .beyond{fill:#d08a2a}.beyond{font-size:85%;color:#8a4a00;width:240px}"
    "table.matrix td,table.matrix th{border:1px solid #ccc;padding:4px 8px;text-align:center;font-size:85%}"
    "td.diag{background:#eee}.beside{display:flex;gap:2em;align-items:flex-start;flex-wrap:wrap}")
