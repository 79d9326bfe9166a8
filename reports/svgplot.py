"""A small pure-Python SVG drawing surface for the documents' figures.

A :class:`Plot` collects marks in data coordinates (points, lines, shaded bands and spans, error bars, reference
lines, contour lines, labels) and writes one SVG document when asked. Each axis runs between two "nice" ticks
(1, 2, 2.5 or 5 times a power of ten) that enclose everything drawn and any limits asked for, unless its limits
are fixed; a value v sits at pixel ``p0 + (v - lo) * (p1 - p0) / (hi - lo)`` (:meth:`Axis.to_px`), written with
two decimals. The look is the project's own: a plain frame-less panel with light horizontal rules, the title
and a one-row key above the panel, values on the left and below.

Text is never markup: every string goes through :func:`svg_text` (control characters removed, length capped,
``& < > " '`` escaped) into a ``<text>`` element. Output is deterministic: no dates, no ids, no randomness, and
the same marks always give the same bytes. Only ``svg``, ``g``, ``title``, ``line``, ``polyline``, ``polygon``,
``path``, ``rect``, ``circle`` and ``text`` elements are written.
"""

from __future__ import annotations

import math
import re
from collections.abc import Iterable, Sequence
from dataclasses import dataclass, field

__all__ = ["Axis", "Plot", "fmt_tick", "nice_step", "nice_ticks", "svg_text"]

FONT = "system-ui, -apple-system, 'Segoe UI', Roboto, 'Noto Sans', sans-serif"
TEXT_CAP = 120
# control characters, bidi overrides and what XML 1.0 cannot hold (surrogates, U+FFFE, U+FFFF)
_CONTROL = re.compile(r"[\x00-\x1f\x7f-\x9f\u202a-\u202e\u2066-\u2069\ud800-\udfff\ufffe\uffff]")
_DASHES = {"solid": "", "dashed": "6 3", "dotted": "1.5 2.5", "dashdot": "6 2.5 1.5 2.5"}


def svg_text(text: object, cap: int = TEXT_CAP) -> str:
    """Text for an SVG element: control, bidi-override and non-XML characters removed, at most `cap` characters (an
    ellipsis marks a cut), and ``& < > " '`` escaped, so no label can become markup or break an attribute."""
    value = _CONTROL.sub("", "" if text is None else str(text).replace("\n", " ").replace("\t", " "))
    if len(value) > cap:
        value = value[: cap - 1].rstrip() + "…"
    return (
        value.replace("&", "&amp;")
        .replace("<", "&lt;")
        .replace(">", "&gt;")
        .replace('"', "&quot;")
        .replace("'", "&#39;")
    )


def nice_step(span: float, target: int = 5) -> float:
    """The tick step among 1, 2, 2.5 and 5 times a power of ten closest above span / target."""
    raw = span / max(target, 1)
    power = 10.0 ** math.floor(math.log10(raw))
    for m in (1.0, 2.0, 2.5, 5.0, 10.0):
        if m * power >= raw * (1 - 1e-9):
            return m * power
    return 10.0 * power  # pragma: no cover - the loop always returns


def nice_ticks(lo: float, hi: float, target: int = 5) -> list[float]:
    """Ticks at multiples of a nice step from the last one at or below `lo` to the first one at or above `hi`.

    A zero-width range is widened by one unit of its magnitude so that it still gets an axis."""
    if not (math.isfinite(lo) and math.isfinite(hi)):
        raise ValueError("axis limits must be finite")
    if hi < lo:
        lo, hi = hi, lo
    if hi - lo <= 1e-12 * max(abs(lo), abs(hi), 1e-300):
        half = 0.5 * (abs(lo) if lo != 0 else 1.0)
        lo, hi = lo - half, hi + half
    step = nice_step(hi - lo, target)
    first = math.floor(lo / step + 1e-9)
    last = math.ceil(hi / step - 1e-9)
    ticks = [k * step for k in range(first, last + 1)]
    return [0.0 if abs(t) < step * 1e-9 else t for t in ticks]


def fmt_tick(value: float, step: float) -> str:
    """A tick label with just enough digits to name the tick exactly (plain notation between 1e-4 and 1e6,
    powers of ten outside)."""
    if value == 0:
        return "0"
    step_exp = math.floor(math.log10(step) + 1e-9)
    extra = 1 if round(step / 10.0**step_exp, 6) == 2.5 else 0
    if abs(value) >= 1e6 or step < 1e-4:
        digits = max(0, math.floor(math.log10(abs(value)) + 1e-9) - step_exp + extra)
        return f"{value:.{digits}e}"
    decimals = max(0, -step_exp) + extra
    text = f"{value:.{decimals}f}"
    return "0" if float(text) == 0 else text


def _n(v: float) -> str:
    """A coordinate with two decimals (0.005 px resolution) and no negative zero."""
    text = f"{v:.2f}"
    return "0.00" if text == "-0.00" else text


@dataclass
class Axis:
    """One axis: its data range, the pixel range it maps to and its ticks (value, label)."""

    lo: float
    hi: float
    p0: float
    p1: float
    ticks: list[tuple[float, str]] = field(default_factory=list)

    def to_px(self, v: float) -> float:
        return self.p0 + (v - self.lo) * (self.p1 - self.p0) / (self.hi - self.lo)


@dataclass
class _Mark:
    kind: str
    xs: tuple[float, ...] = ()
    ys: tuple[float, ...] = ()
    extra: tuple[float, ...] = ()
    style: dict[str, object] = field(default_factory=dict)
    label: str | None = None


def _finite(values: Iterable[float]) -> list[float]:
    return [float(v) for v in values if math.isfinite(v)]


class Plot:
    """Marks in data coordinates, then :meth:`svg`. Sizes are in CSS pixels; the SVG scales to its container."""

    def __init__(self, *, width: float = 640, height: float = 330, title: str = "") -> None:
        self.width, self.height, self.title = float(width), float(height), title
        self.marks: list[_Mark] = []
        self.xlabel = ""
        self.ylabel = ""
        self._lim: dict[str, tuple[float | None, float | None, bool]] = {
            "x": (None, None, False),
            "y": (None, None, False),
        }
        self._cats: list[tuple[float, str]] | None = None
        self.grid_x = False
        self.grid_y = True

    # ---- marks ------------------------------------------------------------------------------------------
    def line(
        self,
        xs: Sequence[float],
        ys: Sequence[float],
        *,
        color: str,
        width: float = 1.5,
        dash: str = "solid",
        label: str | None = None,
    ) -> None:
        """A polyline; a non-finite value breaks it into separate runs."""
        self.marks.append(
            _Mark("line", tuple(map(float, xs)), tuple(map(float, ys)), (), _style(color, width, dash), label)
        )

    def band(
        self,
        xs: Sequence[float],
        lows: Sequence[float],
        highs: Sequence[float],
        *,
        color: str,
        label: str | None = None,
    ) -> None:
        """The region between two curves over the same xs, filled."""
        self.marks.append(
            _Mark("band", tuple(map(float, xs)), tuple(map(float, lows)), tuple(map(float, highs)),
                  {"color": color}, label)
        )  # fmt: skip

    def points(
        self,
        xs: Sequence[float],
        ys: Sequence[float],
        *,
        shape: str = "circle",
        size: float = 3.5,
        fill: str = "#ffffff",
        stroke: str = "#22262b",
        label: str | None = None,
    ) -> None:
        """Markers centred on (x, y): circle, square, diamond, triangle or cross."""
        if shape not in _SHAPES:
            raise ValueError(f"unknown marker shape {shape!r}")
        self.marks.append(
            _Mark("points", tuple(map(float, xs)), tuple(map(float, ys)), (),
                  {"shape": shape, "size": size, "fill": fill, "stroke": stroke}, label)
        )  # fmt: skip

    def hline(
        self, y: float, *, color: str, width: float = 1.0, dash: str = "solid", label: str | None = None
    ) -> None:
        """A horizontal reference line across the panel (its value is kept on the axis)."""
        self.marks.append(_Mark("hline", (), (float(y),), (), _style(color, width, dash), label))

    def vline(
        self, x: float, *, color: str, width: float = 1.0, dash: str = "solid", label: str | None = None
    ) -> None:
        """A vertical reference line across the panel (its value is kept on the axis)."""
        self.marks.append(_Mark("vline", (float(x),), (), (), _style(color, width, dash), label))

    def xspan(self, a: float, b: float, *, color: str, label: str | None = None) -> None:
        """A shaded vertical stripe from x = a to x = b over the panel's full height."""
        self.marks.append(_Mark("xspan", (float(a), float(b)), (), (), {"color": color}, label))

    def segments(
        self,
        pairs: Sequence[tuple[tuple[float, float], tuple[float, float]]],
        *,
        color: str,
        width: float = 1.0,
        dash: str = "solid",
        label: str | None = None,
    ) -> None:
        """Separate straight pieces ((x0, y0), (x1, y1)), e.g. error bars; one path for all."""
        xs = tuple(float(v) for (a, b) in pairs for v in (a[0], b[0]))
        ys = tuple(float(v) for (a, b) in pairs for v in (a[1], b[1]))
        self.marks.append(_Mark("segments", xs, ys, (), _style(color, width, dash), label))

    def text(self, x: float, y: float, text: str, *, dx: float = 4, dy: float = -4, size: float = 10) -> None:
        """A label next to a data point, offset by (dx, dy) pixels."""
        self.marks.append(_Mark("text", (float(x),), (float(y),), (dx, dy, size), {"text": text}))

    def contour(
        self,
        xs: Sequence[float],
        ys: Sequence[float],
        z: Sequence[Sequence[float]],
        level: float,
        *,
        color: str,
        width: float = 1.0,
        dash: str = "solid",
        label: str | None = None,
        tag: str | None = None,
    ) -> int:
        """The line where z = level (marching squares, linear along cell edges; z[i][j] sits at (xs[j], ys[i])),
        with `tag` written beside it. Returns the number of pieces drawn."""
        pairs = contour_segments(xs, ys, z, level)
        if not pairs:
            return 0
        self.segments(pairs, color=color, width=width, dash=dash, label=label)
        if tag:
            (x0, y0), (x1, y1) = pairs[len(pairs) // 2]
            self.text((x0 + x1) / 2, (y0 + y1) / 2, tag, dx=2, dy=-2, size=9)
        return len(pairs)

    # ---- axes -------------------------------------------------------------------------------------------
    def xlim(self, lo: float | None = None, hi: float | None = None, *, exact: bool = False) -> None:
        """Keep [lo, hi] on the x axis; `exact` fixes the axis to it instead of widening to nice ticks."""
        self._lim["x"] = (lo, hi, exact)

    def ylim(self, lo: float | None = None, hi: float | None = None, *, exact: bool = False) -> None:
        """Keep [lo, hi] on the y axis; `exact` fixes the axis to it instead of widening to nice ticks."""
        self._lim["y"] = (lo, hi, exact)

    def ycategories(self, positions: Sequence[float], labels: Sequence[str]) -> None:
        """Name the rows of a y axis (one label per position) instead of numeric ticks."""
        self._cats = [(float(p), str(t)) for p, t in zip(positions, labels, strict=True)]

    # ---- rendering --------------------------------------------------------------------------------------
    def _values(self, which: str) -> list[float]:
        out: list[float] = []
        for m in self.marks:
            if which == "x":
                if m.kind in ("line", "band", "points", "segments", "text", "vline", "xspan"):
                    out += _finite(m.xs)
            else:
                if m.kind in ("line", "points", "segments", "text", "hline"):
                    out += _finite(m.ys)
                elif m.kind == "band":
                    out += _finite(m.ys) + _finite(m.extra)
        return out

    def _padding(self, which: str) -> list[float]:
        """Room of 3 % of the span beyond the outermost markers, so none sits on the panel's edge (a marker at
        or beyond zero is not pushed across it)."""
        marked = [
            v for m in self.marks if m.kind == "points" for v in _finite(m.xs if which == "x" else m.ys)
        ]
        values = self._values(which)
        if not marked or not values:
            return []
        lo, hi = min(values), max(values)
        pad = 0.03 * (hi - lo)
        out = [min(marked) - pad, max(marked) + pad]
        if lo >= 0 > out[0]:
            out[0] = 0.0
        if hi <= 0 < out[1]:
            out[1] = 0.0
        return out

    def _axis(self, which: str, p0: float, p1: float) -> Axis:
        lo_req, hi_req, exact = self._lim[which]
        values = self._values(which)
        if which == "y" and self._cats:
            values = values + [p for p, _ in self._cats]
        if exact and lo_req is not None and hi_req is not None:
            lo, hi = float(lo_req), float(hi_req)
            ticks = nice_ticks(lo, hi)
            step = ticks[1] - ticks[0] if len(ticks) > 1 else 1.0
            inside = [t for t in ticks if lo - 1e-9 * step <= t <= hi + 1e-9 * step]
        else:
            pool = values + [v for v in (lo_req, hi_req) if v is not None] + self._padding(which)
            lo, hi = (min(pool), max(pool)) if pool else (0.0, 1.0)
            inside = nice_ticks(lo, hi)
            step = inside[1] - inside[0]
            lo, hi = inside[0], inside[-1]
        axis = Axis(lo, hi, p0, p1)
        if which == "y" and self._cats is not None:
            axis.ticks = [(p, t) for p, t in self._cats]
        else:
            axis.ticks = [(t, fmt_tick(t, step)) for t in inside]
        return axis

    def svg(self) -> str:
        """The figure as one SVG document (UTF-8 text, no XML prologue, nothing external)."""
        w, h = self.width, self.height
        ytick_chars = 0
        if self._cats is not None:
            ytick_chars = max((min(len(t), 28) for _, t in self._cats), default=0)
        left = 14.0 + (16 if self.ylabel else 0)
        top = 10 + (18 if self.title else 0)
        legend = [m for m in self.marks if m.label]
        rows = _legend_rows(legend, w - 20)
        top += 16 * len(rows) + (4 if rows else 0)
        bottom = 26 + (18 if self.xlabel else 0)
        # y axis first (its labels' width sets the left margin), then x
        yaxis = self._axis("y", h - bottom, top + 4)
        if self._cats is None:
            ytick_chars = max((len(label) for _, label in yaxis.ticks), default=1)
        left += (5.4 if self._cats is not None else 6.2) * ytick_chars + 8
        xaxis = self._axis("x", left, w - 16)
        parts = [
            f'<svg xmlns="http://www.w3.org/2000/svg" viewBox="0 0 {_n(w)} {_n(h)}" width="{_n(w)}" '
            f'height="{_n(h)}" font-family="{FONT}" font-size="11" class="ivd-plot" role="img">'
        ]
        if self.title:
            parts.append(f"<title>{svg_text(self.title)}</title>")
        parts.append(f'<rect class="panel" x="0" y="0" width="{_n(w)}" height="{_n(h)}" fill="#ffffff"/>')
        parts += self._frame(xaxis, yaxis)
        for m in self.marks:
            parts += _draw(m, xaxis, yaxis)
        parts += self._texts(xaxis, yaxis, rows)
        parts.append("</svg>")
        return "\n".join(parts) + "\n"

    def _frame(self, xa: Axis, ya: Axis) -> list[str]:
        x0, x1, y0, y1 = xa.p0, xa.p1, ya.p0, ya.p1
        out = ['<g class="frame" stroke-width="1" fill="none">']
        if self.grid_y:
            for v, _ in ya.ticks:
                py = _n(ya.to_px(v))
                out.append(
                    f'<line class="rule" x1="{_n(x0)}" y1="{py}" x2="{_n(x1)}" y2="{py}" stroke="#ebe7de"/>'
                )
        if self.grid_x:
            for v, _ in xa.ticks:
                px = _n(xa.to_px(v))
                out.append(
                    f'<line class="rule" x1="{px}" y1="{_n(y0)}" x2="{px}" y2="{_n(y1)}" stroke="#ebe7de"/>'
                )
        out.append(
            f'<line class="axis" x1="{_n(x0)}" y1="{_n(y0 + 0.5)}" x2="{_n(x1)}" y2="{_n(y0 + 0.5)}" '
            'stroke="#8a9099"/>'
        )
        out.append("</g>")
        return out

    def _texts(self, xa: Axis, ya: Axis, rows: list[list[_Mark]]) -> list[str]:
        out = ['<g class="labels" fill="#4d545c">']
        for v, label in xa.ticks:
            px = _n(xa.to_px(v))
            out.append(
                f'<line class="tick-x" x1="{px}" y1="{_n(ya.p0 + 1)}" x2="{px}" y2="{_n(ya.p0 + 5)}" '
                'stroke="#8a9099"/>'
            )
            out.append(
                f'<text class="tick-x" x="{px}" y="{_n(ya.p0 + 17)}" text-anchor="middle">{svg_text(label)}</text>'
            )
        cap = 28 if self._cats is not None else TEXT_CAP
        size = ' font-size="9.5"' if self._cats is not None else ""
        for v, label in ya.ticks:
            py = ya.to_px(v)
            out.append(
                f'<text class="tick-y" x="{_n(xa.p0 - 6)}" y="{_n(py + 3.5)}" data-at="{_n(py)}" '
                f'text-anchor="end"{size}>{svg_text(label, cap)}</text>'
            )
        if svg_text(self.xlabel):
            out.append(
                f'<text class="xlabel" x="{_n((xa.p0 + xa.p1) / 2)}" y="{_n(self.height - 8)}" '
                f'text-anchor="middle" fill="#22262b">{svg_text(self.xlabel)}</text>'
            )
        if svg_text(self.ylabel):
            cy = _n((ya.p0 + ya.p1) / 2)
            out.append(
                f'<text class="ylabel" x="14" y="{cy}" transform="rotate(-90 14 {cy})" text-anchor="middle" '
                f'fill="#22262b">{svg_text(self.ylabel)}</text>'
            )
        y = 10.0
        if svg_text(self.title):
            out.append(f'<text class="title" x="10" y="{_n(y + 9)}" fill="#22262b" font-size="11.5" '
                       f'font-weight="600">{svg_text(self.title)}</text>')  # fmt: skip
            y += 18
        for row in rows:
            x = 10.0
            for m in row:
                out += _swatch(m, x, y + 6)
                out.append(f'<text class="key" x="{_n(x + 26)}" y="{_n(y + 10)}">{svg_text(m.label)}</text>')
                x += _key_width(m)
            y += 16
        out.append("</g>")
        return out


def _style(color: str, width: float, dash: str) -> dict[str, object]:
    if dash not in _DASHES:
        raise ValueError(f"unknown dash {dash!r}; use one of {', '.join(_DASHES)}")
    return {"color": color, "width": width, "dash": dash}


def _stroke(style: dict[str, object]) -> str:
    dash = _DASHES[str(style["dash"])]
    extra = f' stroke-dasharray="{dash}"' if dash else ""
    return f'fill="none" stroke="{style["color"]}" stroke-width="{style["width"]}"{extra}'


def _runs(xs: Sequence[float], ys: Sequence[float]) -> list[list[tuple[float, float]]]:
    runs: list[list[tuple[float, float]]] = [[]]
    for x, y in zip(xs, ys, strict=True):
        if math.isfinite(x) and math.isfinite(y):
            runs[-1].append((x, y))
        elif runs[-1]:
            runs.append([])
    return [r for r in runs if r]


_SHAPES = {
    # marker outlines relative to the centre, in units of the marker's size
    "square": "m-{s} -{s}h{d}v{d}h-{d}z",
    "diamond": "m0 -{t}l{t} {t}-{t} {t}-{t} -{t}z",
    "triangle": "m0 -{t}l{u} {v}h-{w}z",
    "cross": "m-{s} -{s}l{d} {d}m0 -{d}l-{d} {d}",
    "circle": "",
}


def _marker(shape: str, cx: float, cy: float, size: float, fill: str, stroke: str, cls: str) -> str:
    if shape == "circle":
        return f'<circle class="{cls}" cx="{_n(cx)}" cy="{_n(cy)}" r="{size:g}" fill="{fill}" stroke="{stroke}"/>'
    s = size * 0.85
    t = size * 1.2
    d = _SHAPES[shape].format(s=_n(s), d=_n(2 * s), t=_n(t), u=_n(t * 0.95), v=_n(t * 1.65), w=_n(t * 1.9))
    fill_attr = "none" if shape == "cross" else fill
    return f'<path class="{cls}" d="M{_n(cx)} {_n(cy)}{d}" fill="{fill_attr}" stroke="{stroke}"/>'


def _draw(m: _Mark, xa: Axis, ya: Axis) -> list[str]:
    if m.kind == "line":
        out = []
        for run in _runs(m.xs, m.ys):
            pts = " ".join(f"{_n(xa.to_px(x))},{_n(ya.to_px(y))}" for x, y in run)
            out.append(f'<polyline class="line" points="{pts}" {_stroke(m.style)} stroke-linejoin="round"/>')
        return out
    if m.kind == "band":
        out = []
        keep = [
            (x, a, b) for x, a, b in zip(m.xs, m.ys, m.extra, strict=True)
            if math.isfinite(x) and math.isfinite(a) and math.isfinite(b)
        ]  # fmt: skip
        if len(keep) >= 2:
            upper = [f"{_n(xa.to_px(x))},{_n(ya.to_px(b))}" for x, _, b in keep]
            lower = [f"{_n(xa.to_px(x))},{_n(ya.to_px(a))}" for x, a, _ in reversed(keep)]
            out.append(
                f'<polygon class="band" points="{" ".join(upper + lower)}" fill="{m.style["color"]}"/>'
            )
        return out
    if m.kind == "points":
        st = m.style
        return [
            '<g class="points" stroke-width="1.2">',
            *(
                _marker(str(st["shape"]), xa.to_px(x), ya.to_px(y), float(str(st["size"])), str(st["fill"]),
                        str(st["stroke"]), "pt")
                for x, y in zip(m.xs, m.ys, strict=True)
                if math.isfinite(x) and math.isfinite(y)
            ),
            "</g>",
        ]  # fmt: skip
    if m.kind == "hline":
        py = _n(ya.to_px(m.ys[0]))
        return [
            f'<line class="hline" x1="{_n(xa.p0)}" y1="{py}" x2="{_n(xa.p1)}" y2="{py}" {_stroke(m.style)}/>'
        ]
    if m.kind == "vline":
        px = _n(xa.to_px(m.xs[0]))
        return [
            f'<line class="vline" x1="{px}" y1="{_n(ya.p0)}" x2="{px}" y2="{_n(ya.p1)}" {_stroke(m.style)}/>'
        ]
    if m.kind == "xspan":
        a, b = sorted((xa.to_px(m.xs[0]), xa.to_px(m.xs[1])))
        return [
            f'<rect class="span" x="{_n(a)}" y="{_n(ya.p1)}" width="{_n(b - a)}" height="{_n(ya.p0 - ya.p1)}" '
            f'fill="{m.style["color"]}"/>'
        ]
    if m.kind == "segments":
        d = "".join(
            f"M{_n(xa.to_px(m.xs[i]))} {_n(ya.to_px(m.ys[i]))}L{_n(xa.to_px(m.xs[i + 1]))} "
            f"{_n(ya.to_px(m.ys[i + 1]))}"
            for i in range(0, len(m.xs), 2)
            if all(math.isfinite(v) for v in (m.xs[i], m.ys[i], m.xs[i + 1], m.ys[i + 1]))
        )
        return [f'<path class="segments" d="{d}" {_stroke(m.style)}/>'] if d else []
    if m.kind == "text":
        dx, dy, size = m.extra
        return [
            f'<text class="note" x="{_n(xa.to_px(m.xs[0]) + dx)}" y="{_n(ya.to_px(m.ys[0]) + dy)}" '
            f'font-size="{size:g}" fill="#22262b">{svg_text(m.style["text"], 40)}</text>'
        ]
    raise ValueError(f"unknown mark {m.kind!r}")  # pragma: no cover


def _key_width(m: _Mark) -> float:
    return 26 + 6.0 * len(svg_text(m.label)) + 16


def _legend_rows(marks: list[_Mark], room: float) -> list[list[_Mark]]:
    rows: list[list[_Mark]] = []
    used = room + 1
    for m in marks:
        width = _key_width(m)
        if used + width > room:
            rows.append([])
            used = 0.0
        rows[-1].append(m)
        used += width
    return rows


def _swatch(m: _Mark, x: float, y: float) -> list[str]:
    if m.kind in ("band", "xspan"):
        return [
            f'<rect class="swatch" x="{_n(x)}" y="{_n(y - 5)}" width="20" height="10" fill="{m.style["color"]}"/>'
        ]
    if m.kind == "points":
        st = m.style
        return [
            _marker(str(st["shape"]), x + 10, y, float(str(st["size"])), str(st["fill"]), str(st["stroke"]),
                    "swatch")
        ]  # fmt: skip
    return [
        f'<line class="swatch" x1="{_n(x)}" y1="{_n(y)}" x2="{_n(x + 20)}" y2="{_n(y)}" {_stroke(m.style)}/>'
    ]


def contour_segments(
    xs: Sequence[float], ys: Sequence[float], z: Sequence[Sequence[float]], level: float
) -> list[tuple[tuple[float, float], tuple[float, float]]]:
    """Pieces of the line z = level across a grid (marching squares; the crossing on each cell edge is found
    by linear interpolation; a saddle cell is resolved by the mean of its four corners)."""
    out: list[tuple[tuple[float, float], tuple[float, float]]] = []
    for i in range(len(ys) - 1):
        for j in range(len(xs) - 1):
            corners = (
                (xs[j], ys[i], z[i][j]),
                (xs[j + 1], ys[i], z[i][j + 1]),
                (xs[j + 1], ys[i + 1], z[i + 1][j + 1]),
                (xs[j], ys[i + 1], z[i + 1][j]),
            )
            if not all(math.isfinite(c[2]) for c in corners):
                continue
            above = [c[2] >= level for c in corners]
            if all(above) or not any(above):
                continue
            cuts: list[tuple[int, tuple[float, float]]] = []
            for e in range(4):
                a, b = corners[e], corners[(e + 1) % 4]
                if (a[2] >= level) != (b[2] >= level):
                    t = (level - a[2]) / (b[2] - a[2])
                    cuts.append((e, (a[0] + t * (b[0] - a[0]), a[1] + t * (b[1] - a[1]))))
            if len(cuts) == 2:
                out.append((cuts[0][1], cuts[1][1]))
            elif len(cuts) == 4:  # saddle: pair each cut with a neighbour on the side the centre is on
                centre_above = sum(c[2] for c in corners) / 4 >= level
                if centre_above == above[0]:  # corners 0 and 2 joined: cut off corners 1 and 3
                    out += [(cuts[0][1], cuts[1][1]), (cuts[2][1], cuts[3][1])]
                else:  # corners 1 and 3 joined: cut off corners 0 and 2
                    out += [(cuts[3][1], cuts[0][1]), (cuts[1][1], cuts[2][1])]
    return out
