"""Drawing one ceramic tile procedurally: a glaze colour times a surface pattern.

The glaze dominates the picture, so colour is recognisable; the pattern is drawn in a rotated,
scaled coordinate frame with grout lines in a contrasting neutral, then lit unevenly, blurred
slightly and given sensor noise. Everything is vectorised numpy on a (size, size) grid.
"""
from __future__ import annotations

import math

import numpy as np
from PIL import Image, ImageFilter

GLAZES: dict[str, tuple[int, int, int]] = {
    "cobalt": (28, 66, 168),
    "terracotta": (186, 80, 50),
    "sage": (140, 158, 96),
    "ochre": (222, 172, 30),
    "celadon": (128, 196, 178),
    "oxblood": (116, 18, 40),
    "ivory": (238, 232, 212),
    "charcoal": (58, 60, 66),
    "teal": (18, 124, 128),
}

PATTERNS: tuple[str, ...] = (
    "herringbone", "chevron", "terrazzo", "hexagonal", "pinstripe", "checkerboard", "basketweave",
    "fish scale", "quatrefoil", "zellige", "subway", "penny round", "crackle", "moroccan star",
)

# module size (pixels per pattern unit at 160 px) and whether per-piece shading is strong
_MODULE_PX = {
    "herringbone": 14, "chevron": 26, "terrazzo": 9, "hexagonal": 26, "pinstripe": 9,
    "checkerboard": 22, "basketweave": 28, "fish scale": 22, "quatrefoil": 40, "zellige": 20,
    "subway": 13, "penny round": 16, "crackle": 15, "moroccan star": 40,
}
_TABLE = (61, 67)  # coprime-ish sizes for hashing integer piece coordinates into random tables


# ---------------------------------------------------------------------------------------------
# pattern geometry: each returns (edge distance in units, per-piece shade, optional overlay)


class _Frame:
    """Pattern coordinates of every pixel plus random tables to hash piece ids into."""

    def __init__(self, u: np.ndarray, v: np.ndarray, module_px: float, rng: np.random.Generator):
        self.u, self.v, self.m = u, v, module_px
        self.tables = rng.random((6, *_TABLE), dtype=np.float32)  # uniforms in [0, 1)
        self.rng = rng

    def table(self, which: int, a: np.ndarray, b: np.ndarray) -> np.ndarray:
        return self.tables[which][a.astype(np.int64) % _TABLE[0], b.astype(np.int64) % _TABLE[1]]

    def tables_at(self, a: np.ndarray, b: np.ndarray) -> np.ndarray:
        """All six tables at once, (6, S, S): one gather instead of six."""
        flat = (a.astype(np.int64) % _TABLE[0]) * _TABLE[1] + b.astype(np.int64) % _TABLE[1]
        return self.tables.reshape(6, -1)[:, flat]

    def shade(self, a, b, strength: float) -> np.ndarray:
        """Per-piece brightness: real glazes vary from piece to piece."""
        return 1.0 + strength * (self.table(0, a, b) - 0.5) * 2.0


def _pick(condition: np.ndarray, yes: float, no: float) -> np.ndarray:
    """np.where for two constants, staying float32 (np.where on Python floats gives float64)."""
    return np.where(condition, np.float32(yes), np.float32(no))


def _rect_edge(lx, ly, w, h):
    """Distance to the border of a w x h rectangle, from local coords inside it."""
    return np.minimum(np.minimum(lx, w - lx), np.minimum(ly, h - ly))


def _herringbone(f: _Frame):
    # 2x1 bricks; lattice (1,1),(2,-2): a point lies in a horizontal brick iff (u - floor v) mod 4 < 2
    u, v = f.u, f.v
    fy, fx = np.floor(v), np.floor(u)
    t_h, t_v = np.mod(u - fy, 4.0), np.mod(v - fx - 1.0, 4.0)
    horizontal = t_h < 2.0
    edge = np.where(horizontal, _rect_edge(t_h, v - fy, 2.0, 1.0), _rect_edge(u - fx, t_v, 1.0, 2.0))
    a = np.where(horizontal, fy, fx + 500)
    b = np.where(horizontal, np.floor((u - fy) / 4.0), np.floor((v - fx - 1.0) / 4.0))
    return edge, f.shade(a, b, 0.08), None


def _chevron(f: _Frame):
    column = np.floor(f.u)
    lx = f.u - column - 0.5
    slope = _pick(np.mod(column, 2) == 0, 1.0, -1.0)
    band_height = 0.45
    t = (f.v + slope * lx) / band_height
    band = np.floor(t)
    across = np.minimum(t - band, 1.0 - (t - band)) * band_height / math.sqrt(2.0)  # 45-degree cuts
    edge = np.minimum(across, 0.5 - np.abs(lx))
    two_tone = _pick(np.mod(band, 2) == 0, 1.05, 0.92)  # alternating bands make the V read
    return edge, two_tone * f.shade(column, band, 0.04), None


def _terrazzo(f: _Frame):
    # joints every 4 units; chips: at most one jittered ellipse per unit cell, nearest of 3x3 cells
    joint = 4.0
    edge = _rect_edge(np.mod(f.u, joint), np.mod(f.v, joint), joint, joint)
    cu, cv = np.floor(f.u), np.floor(f.v)
    best = np.full(f.u.shape, np.inf, dtype=np.float32)
    chip_tone = np.zeros(f.u.shape, dtype=np.float32)
    for du in (-1, 0, 1):
        for dv in (-1, 0, 1):
            a, b = cu + du, cv + dv
            t = f.tables_at(a, b)  # (6, S, S)
            centre_u, centre_v = a + 0.2 + 0.6 * t[1], b + 0.2 + 0.6 * t[2]
            radius, aspect = 0.12 + 0.22 * t[3], 0.6 + 0.8 * t[4]
            d = np.hypot((f.u - centre_u) * aspect, (f.v - centre_v) / aspect) / radius
            d = np.where(t[5] < 0.6, d, np.float32(np.inf))  # 60% of cells hold a chip
            closer = d < best
            best = np.where(closer, d, best)
            chip_tone = np.where(closer, t[0], chip_tone)
    chip = np.clip((1.0 - best) * f.m * 0.35 + 0.5, 0.0, 1.0)  # anti-aliased chip edge
    return edge, np.ones_like(f.u), ("chips", chip, chip_tone)


def _hexagonal(f: _Frame):
    # two offset rectangular lattices; the nearer centre is the hexagon the pixel lies in
    s = math.sqrt(3.0)
    p = np.stack([f.u, f.v])
    period = np.array([1.0, s], dtype=np.float32).reshape(2, 1, 1)
    a = np.mod(p, period) - period / 2
    b = np.mod(p - period / 2, period) - period / 2
    use_a = (a ** 2).sum(0) < (b ** 2).sum(0)
    q = np.where(use_a, a, b)
    centre = p - q
    qx, qy = np.abs(q[0]), np.abs(q[1])
    # pointy-top hexagon with inradius 0.5: distance to its nearest side
    edge = 0.5 - np.maximum(qx, qx * 0.5 + qy * (s / 2))
    return edge, f.shade(np.round(centre[0] * 2), np.round(centre[1] * 2 / s), 0.06), None


def _pinstripe(f: _Frame):
    line = np.abs(f.u - np.round(f.u))  # thin printed lines one unit apart, finer than grout
    joint = 12.0
    joints = _rect_edge(np.mod(f.u + 0.5, joint), np.mod(f.v, joint), joint, joint)
    shade = f.shade(np.floor((f.u + 0.5) / joint), np.floor(f.v / joint), 0.04)
    return joints, shade, ("lines", line, 0.8, 1.0)


def _checkerboard(f: _Frame):
    a, b = np.floor(f.u), np.floor(f.v)
    tone = _pick(np.mod(a + b, 2) == 0, 1.08, 0.86)
    return _rect_edge(f.u - a, f.v - b, 1.0, 1.0), tone * f.shade(a, b, 0.03), None


def _basketweave(f: _Frame):
    a, b = np.floor(f.u), np.floor(f.v)
    lu, lv = f.u - a, f.v - b
    across = np.where(np.mod(a + b, 2) == 0, lv, lu)  # strips run one way, then the other
    strip = np.floor(across * 2.0)
    within = across * 2.0 - strip
    edge = np.minimum(_rect_edge(lu, lv, 1.0, 1.0), np.minimum(within, 1.0 - within) / 2.0)
    return edge, f.shade(a * 2 + strip, b, 0.08), None


def _fish_scale(f: _Frame):
    # rows of unit disks (radius 0.5) every half unit, odd rows offset; the upper row overlaps
    row = np.floor(2.0 * f.v)
    dists = []
    for j in (row, row + 1.0):
        offset = 0.5 * np.mod(j, 2)
        cx = np.round(f.u - offset) + offset
        dists.append(np.hypot(f.u - cx, f.v - j / 2.0))
    d_low, d_up = dists
    in_upper = d_up < 0.5
    edge = np.where(in_upper, 0.5 - d_up, np.minimum(np.abs(0.5 - d_low), d_up - 0.5))
    depth = np.where(in_upper, d_up, d_low) / 0.5  # 0 at a scale's centre, 1 at its rim
    return edge, 1.06 - 0.12 * depth, None


def _quatrefoil(f: _Frame):
    a, b = np.floor(f.u), np.floor(f.v)
    qx, qy = f.u - a - 0.5, f.v - b - 0.5
    c, radius = 0.17, 0.23
    nearest = np.minimum(np.minimum(np.hypot(qx - c, qy), np.hypot(qx + c, qy)),
                         np.minimum(np.hypot(qx, qy - c), np.hypot(qx, qy + c)))
    signed = nearest - radius  # < 0 inside the four-lobed piece
    tone = _pick(signed < 0, 1.04, 0.91)
    return np.abs(signed), tone * f.shade(a, b, 0.04), None


def _zellige(f: _Frame):
    # hand-cut squares: wobbly joints, strong piece-to-piece variation, glaze pooling at the edges
    ph = f.tables[0][0, :4] * 2 * np.pi
    u = f.u + 0.03 * np.sin(2.3 * f.v + ph[0]) + 0.025 * np.sin(5.1 * f.v + ph[1])
    v = f.v + 0.03 * np.sin(2.1 * f.u + ph[2]) + 0.025 * np.sin(4.7 * f.u + ph[3])
    a, b = np.floor(u), np.floor(v)
    edge = _rect_edge(u - a, v - b, 1.0, 1.0)
    pooling = 1.0 - 0.12 * np.exp(-edge * f.m / 2.5)
    return edge, pooling * f.shade(a, b, 0.16), None


def _subway(f: _Frame):
    row = np.floor(f.v)
    u = f.u + 1.5 * np.mod(row, 2)  # running bond: every other row shifted half a brick
    col = np.floor(u / 3.0)
    return _rect_edge(u - col * 3.0, f.v - row, 3.0, 1.0), f.shade(col, row, 0.06), None


def _penny_round(f: _Frame):
    row = np.floor(f.v / 0.866 + 0.5)
    offset = 0.5 * np.mod(row, 2)
    col = np.round(f.u - offset)
    d = np.hypot(f.u - col - offset, f.v - row * 0.866)
    edge = 0.47 - d  # negative between the dots: that area is grout
    return edge, f.shade(col, row, 0.07), None


def _crackle(f: _Frame):
    # craquelure: second-minus-first nearest distance to jittered points is small on cell borders
    cu, cv = np.floor(f.u), np.floor(f.v)
    first = np.full(f.u.shape, np.inf, dtype=np.float32)
    second = first.copy()
    for du in (-1, 0, 1):
        for dv in (-1, 0, 1):
            a, b = cu + du, cv + dv
            t = f.tables_at(a, b)  # (6, S, S)
            d = np.hypot(f.u - a - t[1], f.v - b - t[2])
            second = np.where(d < first, first, np.minimum(second, d))
            first = np.minimum(first, d)
    cracks = (second - first) * 0.5
    joint = 5.0
    joints = _rect_edge(np.mod(f.u, joint), np.mod(f.v, joint), joint, joint)
    return joints, f.shade(np.floor(f.u / joint), np.floor(f.v / joint), 0.05), ("lines", cracks, 0.75, 0.55)


def _moroccan_star(f: _Frame):
    a, b = np.floor(f.u), np.floor(f.v)
    qx, qy = np.abs(f.u - a - 0.5), np.abs(f.v - b - 0.5)
    star = np.minimum(np.maximum(qx, qy), (qx + qy) / math.sqrt(2.0))  # union of two squares at 45 deg
    signed = star - 0.35  # tips touch their neighbours; the crosses fill what is left
    tone = _pick(signed < 0, 1.04, 0.89)
    return np.abs(signed), tone * f.shade(a, b, 0.04), None


_DRAW = {
    "herringbone": _herringbone, "chevron": _chevron, "terrazzo": _terrazzo, "hexagonal": _hexagonal,
    "pinstripe": _pinstripe, "checkerboard": _checkerboard, "basketweave": _basketweave,
    "fish scale": _fish_scale, "quatrefoil": _quatrefoil, "zellige": _zellige, "subway": _subway,
    "penny round": _penny_round, "crackle": _crackle, "moroccan star": _moroccan_star,
}
assert set(_DRAW) == set(PATTERNS)


# ---------------------------------------------------------------------------------------------
# rendering


def grout_colour(glaze: str) -> np.ndarray:
    """A neutral that contrasts with the glaze: dark grout on light glazes, light on dark."""
    r, g, b = GLAZES[glaze]
    luminance = 0.299 * r + 0.587 * g + 0.114 * b
    return np.array((96, 94, 90) if luminance > 150 else (212, 208, 200), dtype=np.float32)


def _lighting(x: np.ndarray, y: np.ndarray, size: int, rng: np.random.Generator) -> np.ndarray:
    """Uneven studio light: a brightness level, a linear falloff and sometimes a soft gloss spot."""
    angle = rng.uniform(0, 2 * math.pi)
    light = rng.uniform(0.95, 1.06) * (1.0 + rng.uniform(-0.14, 0.14) * (x * math.cos(angle) + y * math.sin(angle)) / size)
    if rng.random() < 0.4:
        cx, cy = (float(c) * size for c in rng.uniform(-0.3, 0.3, size=2))
        light = light + rng.uniform(0.05, 0.14) * np.exp(-((x - cx) ** 2 + (y - cy) ** 2) / (2 * (0.18 * size) ** 2))
    return light


def draw_tile(glaze: str, pattern: str, rng: np.random.Generator, size: int = 160) -> Image.Image:
    """One product photo of GLAZE x PATTERN, jittered in scale, angle, lighting, blur and noise."""
    if glaze not in GLAZES:
        raise ValueError(f"unknown glaze {glaze!r}; known: {', '.join(GLAZES)}")
    if pattern not in _DRAW:
        raise ValueError(f"unknown pattern {pattern!r}; known: {', '.join(PATTERNS)}")
    scale = size / 160.0
    module = _MODULE_PX[pattern] * scale * rng.uniform(0.82, 1.22)  # (pixels per pattern unit)
    angle = math.radians(rng.uniform(-25, 25))
    coords = np.arange(size, dtype=np.float32) - size / 2 + 0.5
    x, y = np.meshgrid(coords, coords)  # (S, S) each
    cos, sin = math.cos(angle), math.sin(angle)  # Python floats keep the arrays float32
    u = (cos * x + sin * y) / module + rng.uniform(0, 8)
    v = (-sin * x + cos * y) / module + rng.uniform(0, 8)
    frame = _Frame(u.astype(np.float32), v.astype(np.float32), module, rng)
    edge, shade, overlay = _DRAW[pattern](frame)

    tint = rng.uniform(0.96, 1.04, size=3).astype(np.float32)  # firing batches differ slightly
    glaze_rgb = np.array(GLAZES[glaze], dtype=np.float32) * tint
    grout_rgb = grout_colour(glaze) + rng.uniform(-8, 8)
    # slow ripples in the glaze surface, so no two tiles are flat copies of each other
    ripple = 1.0 + 0.03 * np.sin(x * rng.uniform(0.02, 0.06) + y * rng.uniform(0.02, 0.06) + rng.uniform(0, 6.3))
    image = glaze_rgb * (shade * ripple)[..., None]  # (S, S, 3)

    if overlay is not None and overlay[0] == "chips":
        _, chip, tone = overlay  # terrazzo: marble and stone chips in neutral tones
        chip_rgb = np.where(tone[..., None] < 0.5, 35 + 140 * tone[..., None], 150 + 100 * tone[..., None])
        chip_rgb = np.broadcast_to(chip_rgb, image.shape) * np.array([1.0, 0.98, 0.95], dtype=np.float32)
        image = image * (1 - chip[..., None]) + chip_rgb * chip[..., None]
    if overlay is not None and overlay[0] == "lines":
        _, distance, opacity, grout_share = overlay  # hairlines about 1 px wide: pinstripes, cracks
        line = np.clip(0.9 - distance * module, 0.0, 1.0) * opacity
        line_rgb = grout_share * grout_rgb + (1 - grout_share) * glaze_rgb
        image = image * (1 - line[..., None]) + line_rgb * line[..., None]

    half_width = max(0.5, rng.uniform(0.55, 0.9) * scale)  # grout half-width in pixels
    grout = np.clip(half_width + 0.5 - edge * module, 0.0, 1.0)  # anti-aliased, (S, S)
    image = image * (1 - grout[..., None]) + grout_rgb * grout[..., None]
    image = image * _lighting(x, y, size, rng)[..., None]

    tile = Image.fromarray(np.clip(image, 0, 255).astype(np.uint8))
    tile = tile.filter(ImageFilter.GaussianBlur(radius=rng.uniform(0.2, 0.7) * scale))
    noise = rng.standard_normal(image.shape, dtype=np.float32) * rng.uniform(1.0, 3.0)
    noisy = np.asarray(tile, dtype=np.float32) + noise
    return Image.fromarray(np.clip(noisy + 0.5, 0, 255).astype(np.uint8))
