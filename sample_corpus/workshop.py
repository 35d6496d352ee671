"""Procedural renderer of "Kilnworks", an invented ceramics workshop's photo archive.

Draws one glazed piece (mug, bowl, vase, plate, teapot, jug) on a backdrop, with
Pillow for shapes and numpy for shading and noise, and writes a matching caption.
All randomness comes from the `random.Random` passed in, so a seed gives the same
pixels and words on every run. The data is invented for the demo only.

Import it from the repo root as `from sample_corpus import workshop`, or put
`sample_corpus/` on `sys.path` and `import workshop`.
"""

from __future__ import annotations

import functools
import math
import random

import numpy as np
from PIL import Image, ImageDraw, ImageFilter

ITEMS = ("mug", "bowl", "vase", "plate", "teapot", "jug")

# Glaze name -> base RGB. Names are plain colour words so captions stay simple.
GLAZE_RGB = {
    "blue": (38, 72, 168),
    "green": (58, 128, 66),
    "red": (172, 44, 38),
    "yellow": (228, 182, 46),
    "white": (236, 233, 224),
    "black": (34, 32, 34),
    "turquoise": (46, 168, 172),
    "brown": (118, 72, 42),
    "pink": (226, 136, 160),
}
GLAZES = tuple(GLAZE_RGB)

PATTERNS = ("plain", "striped", "dotted", "speckled")

BACKDROPS = ("wooden table", "white backdrop", "slate", "linen", "concrete")

# Phrases used in captions; the first entry of each is the canonical word.
_BACKDROP_PHRASES = {
    "wooden table": ("a wooden table", "an oak table", "a wooden workbench"),
    "white backdrop": ("a white backdrop", "a plain white background", "a white paper sweep"),
    "slate": ("a slate tile", "dark slate", "a slate slab"),
    "linen": ("a linen cloth", "natural linen", "a linen tablecloth"),
    "concrete": ("a concrete floor", "grey concrete", "a concrete slab"),
}
_PATTERN_WORDS = {
    "plain": ("plain", "solid", "plain"),
    "striped": ("striped", "banded", "striped"),
    "dotted": ("dotted", "polka-dot", "dotted"),
    "speckled": ("speckled", "flecked", "speckled"),
}
_MAKING = ("hand-thrown", "wheel-thrown", "handmade", "stoneware", "porcelain", "small-batch")
_LIGHT = ("studio light", "soft window light", "natural daylight", "morning light",
          "warm afternoon light", "diffuse light")
_TEMPLATES = (
    "{making} {glaze} {pattern} {item} on {backdrop}, {light}",
    "a {glaze} {item} with a {pattern} glaze, photographed on {backdrop}",
    "product photo of a {pattern} {glaze} {item} on {backdrop}",
    "{glaze} glazed {item}, {pattern} finish, resting on {backdrop} in {light}",
    "{making} {item} in {glaze} glaze with a {pattern} surface, shot on {backdrop}",
    "our {glaze} {item}, {pattern}, on {backdrop}",
    "close-up of a {making} {item}, {pattern} {glaze} glaze, {backdrop} behind it",
    "kiln-fresh {glaze} {pattern} {item} sitting on {backdrop}",
)

# Profiles of turned pieces: (height fraction t, radius as a fraction of piece height).
_PROFILES = {
    "mug": ((0.0, 0.34), (0.06, 0.36), (1.0, 0.37)),
    "vase": ((0.0, 0.15), (0.12, 0.24), (0.35, 0.28), (0.62, 0.18), (0.82, 0.085),
             (0.93, 0.09), (1.0, 0.13)),
    "bowl": ((0.0, 0.42), (0.08, 0.6), (0.25, 0.82), (0.5, 0.98), (0.75, 1.07), (1.0, 1.1)),
    "jug": ((0.0, 0.27), (0.25, 0.33), (0.55, 0.31), (0.82, 0.22), (0.92, 0.22), (1.0, 0.25)),
    "teapot": ((0.0, 0.34), (0.08, 0.46), (0.3, 0.56), (0.55, 0.56), (0.8, 0.44),
               (0.93, 0.27), (1.0, 0.14)),
}
# Piece height as a fraction of the image's short side, before the spec's scale.
_HEIGHT = {"mug": 0.44, "vase": 0.68, "bowl": 0.3, "jug": 0.58, "teapot": 0.46, "plate": 0.0}
_OPEN_TOP = {"mug", "vase", "bowl", "jug"}
# Half the drawn width (handles and spouts included) as a fraction of piece height.
_HALF_WIDTH = {"mug": 0.67, "vase": 0.28, "bowl": 1.1, "jug": 0.52, "teapot": 0.93}


def random_spec(rng: random.Random) -> dict:
    """A random scene: item, glaze, pattern, backdrop, plus nuisance parameters."""
    return {
        "item": rng.choice(ITEMS),
        "glaze": rng.choice(GLAZES),
        "pattern": rng.choice(PATTERNS),
        "backdrop": rng.choice(BACKDROPS),
        "dx": round(rng.uniform(-0.18, 0.18), 4),  # horizontal jitter, fraction of width
        "dy": round(rng.uniform(-0.05, 0.05), 4),  # vertical jitter, fraction of height
        "horizon": round(rng.uniform(0.3, 0.62), 4),  # where table meets wall, fraction of height
        "scale": round(rng.uniform(0.75, 1.15), 4),  # piece size multiplier
        "light": round(rng.uniform(-60.0, 60.0), 2),  # light direction, degrees from front
        "elevation": round(rng.uniform(0.18, 0.32), 4),  # camera tilt: rim ellipse ratio
    }


def mismatch(spec: dict, rng: random.Random) -> dict:
    """A copy of `spec` with a different item and a clearly different glaze."""
    out = dict(spec)
    out["item"] = rng.choice([i for i in ITEMS if i != spec["item"]])
    base = GLAZE_RGB[spec["glaze"]]
    far = [g for g in GLAZES if g != spec["glaze"] and _rgb_dist(GLAZE_RGB[g], base) > 110]
    out["glaze"] = rng.choice(far)
    return out


def describe(spec: dict, rng: random.Random) -> str:
    """A natural caption (6-20 words) naming the item, glaze, pattern and backdrop."""
    template = rng.choice(_TEMPLATES)
    text = template.format(
        making=rng.choice(_MAKING),
        glaze=spec["glaze"],
        pattern=rng.choice(_PATTERN_WORDS[spec["pattern"]]),
        item=spec["item"],
        backdrop=rng.choice(_BACKDROP_PHRASES[spec["backdrop"]]),
        light=rng.choice(_LIGHT),
    )
    return text[0].upper() + text[1:] if rng.random() < 0.5 else text


def render(spec: dict, size: tuple[int, int], rng: random.Random) -> Image.Image:
    """Draw `spec` as an RGB photo-like image of `size` (width, height)."""
    w, h = int(size[0]), int(size[1])
    nrng = np.random.default_rng(rng.getrandbits(63))
    light = math.radians(float(spec.get("light", 0.0)))
    horizon = float(spec.get("horizon", 0.5))
    lit = _backdrop(spec["backdrop"], w, h, horizon, nrng)
    img = Image.fromarray(np.clip(lit, 0, 255).astype(np.uint8), "RGB")
    short = min(w, h)
    base_y = h * (0.8 + float(spec.get("dy", 0.0)))
    scale = float(spec.get("scale", 1.0))
    item = spec["item"]
    half = short * scale * (0.38 if item == "plate" else _HEIGHT[item] * _HALF_WIDTH[item])
    cx = w * (0.5 + float(spec.get("dx", 0.0)))
    cx = w / 2 if 2 * half + 8 >= w else min(max(cx, half + 4), w - half - 4)  # keep it in frame
    elev = float(spec.get("elevation", 0.25))
    glaze = np.array(GLAZE_RGB[spec["glaze"]], dtype=np.float32)
    if item == "plate":
        rx = short * 0.38 * scale
        cy = base_y - rx * elev * 1.3
        _shadow(img, cx, cy + rx * elev * 0.35, rx * 1.02, rx * elev * 1.2, light)
        _plate(img, spec, cx, cy, rx, elev, glaze, light, nrng)
    else:
        ph = short * _HEIGHT[item] * scale
        prof = _PROFILES[item]
        rmax = max(r for _, r in prof) * ph
        _shadow(img, cx, base_y + 2, rmax * 1.15, rmax * elev * 1.4 + 4, light)
        _turned(img, spec, cx, base_y, ph, prof, elev, glaze, light, nrng)
        _appendages(ImageDraw.Draw(img), item, cx, base_y, ph, elev, glaze, light)
    img = img.filter(ImageFilter.BoxBlur(0.6))  # soften hard drawn edges, like a lens
    arr = np.asarray(img, dtype=np.float32) * _light_field(w, h, light, horizon, nrng)[..., None]
    grain = nrng.standard_normal((h, w), dtype=np.float32)  # sensor noise, mostly luminance
    arr += 3.2 * grain[..., None]
    return Image.fromarray(np.clip(arr, 0, 255).astype(np.uint8), "RGB")


# ---------------------------------------------------------------- helpers


def _rgb_dist(a, b) -> float:
    return math.sqrt(sum((x - y) ** 2 for x, y in zip(a, b)))


def _smooth_noise(nrng: np.random.Generator, w: int, h: int, cells: int) -> np.ndarray:
    """Low-frequency noise in [-1, 1], HxW, made by upsampling a coarse random grid."""
    gw = max(2, cells)
    gh = max(2, int(round(cells * h / max(w, 1))))
    grid = nrng.uniform(-1.0, 1.0, size=(gh, gw)).astype(np.float32)
    up = Image.fromarray(grid, "F").resize((w, h), Image.Resampling.BICUBIC)
    return np.asarray(up, dtype=np.float32)


def _light_field(w: int, h: int, light: float, horizon: float,
                 nrng: np.random.Generator) -> np.ndarray:
    """Smooth brightness multiplier (HxW): window light, shade, side fall-off, vignette.

    Computed on a coarse grid and upsampled, since it has no fine detail."""
    gw, gh = max(4, w // 8), max(4, h // 8)
    xn = np.linspace(0.0, 1.0, gw, dtype=np.float32)[None, :]
    yn = np.linspace(0.0, 1.0, gh, dtype=np.float32)[:, None]
    field = np.ones((gh, gw), dtype=np.float32)
    for sign in (1.0, -1.0):  # a patch of window light and a patch of shade
        x0, y0 = nrng.uniform(0.0, 1.0), nrng.uniform(0.0, min(1.0, horizon + 0.25))
        sx, sy = nrng.uniform(0.12, 0.4), nrng.uniform(0.12, 0.4)
        amp = nrng.uniform(0.12, 0.3) * sign
        field *= 1.0 + amp * np.exp(-(((xn - x0) / sx) ** 2 + ((yn - y0) / sy) ** 2))
    side = 0.5 + 0.5 * math.sin(light)
    field *= 1.0 - 0.16 * np.abs(xn - side)
    field *= 1.0 - 0.22 * ((xn - 0.5) ** 2 + (yn - 0.5) ** 2)
    field *= 1.0 + 0.24 * _smooth_noise(nrng, gw, gh, 3)  # uneven light, as in a real room
    up = Image.fromarray(field.astype(np.float32), "F").resize((w, h), Image.Resampling.BILINEAR)
    return np.asarray(up, dtype=np.float32)


def _backdrop(name: str, w: int, h: int, horizon: float, nrng: np.random.Generator) -> np.ndarray:
    """Wall and table surface as float RGB (HxWx3), before lighting."""
    ys = np.arange(h, dtype=np.float32)[:, None]
    xs = np.arange(w, dtype=np.float32)[None, :]
    yn = ys / max(h - 1, 1)
    out = np.empty((h, w, 3), dtype=np.float32)
    if name == "white backdrop":
        tone = 238 - 22 * np.abs(yn - 0.55) - 10 * _smooth_noise(nrng, w, h, 3) ** 2
        out[:] = tone[..., None] * np.array([1.0, 0.995, 0.985], dtype=np.float32)
        return out
    wall = {"wooden table": (196, 186, 170), "slate": (150, 152, 156),
            "linen": (206, 200, 188), "concrete": (178, 176, 170)}[name]
    wall_tone = float(nrng.uniform(0.78, 1.08))
    out[:] = (np.array(wall, dtype=np.float32) * (wall_tone * (0.92 + 0.1 * yn))[..., None])
    top = int(min(h, max(0, math.floor(horizon * (h - 1)) + 1)))  # first row of the table
    sh = h - top
    if sh <= 0:
        return out
    ys, yn = ys[top:], yn[top:]
    if name == "wooden table":
        warp = _smooth_noise(nrng, w, sh, 5) * 9.0
        grain = np.sin(ys * 0.55 + warp + 0.8 * np.sin(xs * 0.013))
        tone = 1.0 + 0.12 * grain + 0.05 * _smooth_noise(nrng, w, sh, 60)
        col = (146, 96, 58)
    elif name == "slate":
        tone = 1.0 + 0.18 * _smooth_noise(nrng, w, sh, 7) + 0.08 * _smooth_noise(nrng, w, sh, 40)
        col = (66, 70, 78)
    elif name == "linen":
        weave = 0.5 * (np.sin(xs * 2.1) * np.sin(ys * 2.1))
        tone = 1.0 + 0.05 * weave + 0.06 * _smooth_noise(nrng, w, sh, 9)
        tone = tone + 0.04 * nrng.standard_normal((sh, w)).astype(np.float32)
        col = (214, 198, 170)
    else:  # concrete
        tone = 1.0 + 0.1 * _smooth_noise(nrng, w, sh, 12)
        tone = tone - 0.25 * (nrng.random((sh, w)) < 0.004)
        col = (150, 150, 146)
    depth = np.clip((yn - horizon) / max(1 - horizon, 1e-3), 0, 1)
    out[top:] = np.array(col, dtype=np.float32) * (tone * (0.88 + 0.16 * depth))[..., None]
    return out


def _shadow(img: Image.Image, cx: float, cy: float, rx: float, ry: float, light: float) -> None:
    """A soft contact shadow, blurred at quarter resolution to save time."""
    w, h = img.size
    q = 4
    mask = Image.new("L", (max(1, w // q), max(1, h // q)), 0)
    off = -math.sin(light) * rx * 0.35
    ImageDraw.Draw(mask).ellipse(((cx + off - rx) / q, (cy - ry) / q, (cx + off + rx) / q,
                                  (cy + ry) / q), fill=120)
    mask = mask.filter(ImageFilter.GaussianBlur(max(0.5, rx * 0.12 / q)))
    mask = mask.resize((w, h), Image.Resampling.BILINEAR)
    img.paste((20, 18, 16), (0, 0, w, h), mask)


def _shade(nx: np.ndarray, light: float) -> tuple[np.ndarray, np.ndarray]:
    """Diffuse and specular terms for a surface normal at horizontal angle asin(nx)."""
    phi = np.arcsin(np.clip(nx, -1.0, 1.0))
    cosang = np.cos(phi + light)
    diffuse = 0.38 + 0.62 * np.clip(cosang, 0, 1)
    spec = 0.55 * np.clip(cosang, 0, 1) ** 60
    return diffuse, spec


def _pattern_colour(glaze: np.ndarray) -> np.ndarray:
    lum = 0.3 * glaze[0] + 0.59 * glaze[1] + 0.11 * glaze[2]
    return np.array((70, 44, 30) if lum > 150 else (238, 228, 205), dtype=np.float32)


def _apply_pattern(pattern: str, col: np.ndarray, u: np.ndarray, v: np.ndarray,
                   glaze: np.ndarray, dot_r: float, nrng: np.random.Generator,
                   bands: int) -> np.ndarray:
    """Paint the pattern onto per-pixel colours `col` using surface coordinates (u, v) in px."""
    other = _pattern_colour(glaze)
    if pattern == "striped":
        period = bands
        on = ((v / period) % 1.0) < 0.36
        col[on] = col[on] * 0.25 + other * 0.75 * (col[on] / np.maximum(glaze, 1) * 0.9 + 0.1).clip(0.4, 1.2)
    elif pattern == "dotted":
        step = dot_r * 3.4
        row = np.floor(v / step)  # offset every other row, like hand-placed dots
        uu = ((u / step) + 0.5 * (row % 2)) % 1.0 - 0.5
        vv = (v / step) % 1.0 - 0.5
        on = (uu ** 2 + vv ** 2) * step * step < dot_r * dot_r
        col[on] = col[on] * 0.2 + other * 0.8
    elif pattern == "speckled":
        n = nrng.random(col.shape[0])
        on = n < 0.05
        lum = 0.3 * glaze[0] + 0.59 * glaze[1] + 0.11 * glaze[2]
        col[on] = col[on] * 0.35 if lum > 80 else col[on] * 0.3 + other * 0.6
        on2 = (n >= 0.05) & (n < 0.075)
        col[on2] = col[on2] * 0.6 + other * 0.4
    return col


def _turned(img, spec, cx, base_y, ph, prof, elev, glaze, light, nrng) -> None:
    """A solid of revolution from `prof`, seen from slightly above, pasted onto img."""
    w, h = img.size
    ts, rs = _smooth_profile(prof)
    rs = rs * ph
    rmax = float(rs.max())
    x0, x1 = int(max(0, cx - rmax - 2)), int(min(w, cx + rmax + 3))
    y0 = int(max(0, base_y - ph - rmax * elev - 2))
    y1 = int(min(h, base_y + rmax * elev + 3))
    if x1 <= x0 or y1 <= y0:
        return
    ys, xs = np.mgrid[y0:y1, x0:x1].astype(np.float32)
    dx = xs - cx
    t = (base_y - ys) / ph
    for _ in range(3):  # fixed point: rows bend into ellipses on the front surface
        r = np.interp(np.clip(t, 0, 1), ts, rs)
        front = elev * np.sqrt(np.clip(r * r - dx * dx, 0, None))
        t = (base_y - ys + front) / ph
    r = np.interp(np.clip(t, 0, 1), ts, rs)
    inside = (np.abs(dx) <= r) & (t >= 0) & (t <= 1)
    nx = np.where(r > 0, dx / np.maximum(r, 1e-3), 0)
    diffuse, spec_term = _shade(nx, light)
    # Surface coordinates in pixels for the pattern: arc length around, height up.
    u = np.arcsin(np.clip(nx, -1, 1)) * r
    v = t * ph
    col = glaze[None, :] * diffuse[inside][:, None]
    col = _apply_pattern(spec["pattern"], col, u[inside], v[inside], glaze,
                         max(2.0, ph * 0.035), nrng, max(6, int(ph * 0.12)))
    col = col + 255.0 * spec_term[inside][:, None]
    region = np.asarray(img.crop((x0, y0, x1, y1)), dtype=np.float32).copy()
    region[inside] = col
    # The open rim: an ellipse at the top showing the darker inside.
    rtop = float(rs[-1])
    if spec["item"] in _OPEN_TOP and rtop > 1:
        ty = base_y - ph
        ell = ((dx / rtop) ** 2 + ((ys - ty) / max(rtop * elev, 1)) ** 2)
        lip = ell <= 1.0
        region[lip] = glaze * 0.9 + 18
        inner = ell <= 0.82
        depth = np.clip((ys - (ty - rtop * elev)) / max(2 * rtop * elev, 1), 0, 1)
        inner_col = glaze[None, :] * (0.28 + 0.3 * depth[inner])[:, None]
        region[inner] = inner_col
    img.paste(Image.fromarray(np.clip(region, 0, 255).astype(np.uint8), "RGB"), (x0, y0))


@functools.lru_cache(maxsize=None)
def _smooth_profile(prof) -> tuple[np.ndarray, np.ndarray]:
    """Catmull-Rom spline through the profile's control points, 24 samples per span."""
    pts = np.array(prof, dtype=np.float64)
    ext = np.vstack([pts[0], pts, pts[-1]])
    out = []
    for i in range(1, len(ext) - 2):
        p0, p1, p2, p3 = ext[i - 1], ext[i], ext[i + 1], ext[i + 2]
        for s in np.linspace(0.0, 1.0, 24, endpoint=False):
            out.append(0.5 * (2 * p1 + (-p0 + p2) * s + (2 * p0 - 5 * p1 + 4 * p2 - p3) * s * s
                              + (-p0 + 3 * p1 - 3 * p2 + p3) * s ** 3))
    out.append(pts[-1])
    arr = np.array(out)
    ts = np.maximum.accumulate(arr[:, 0])  # keep heights increasing for np.interp
    return ts.astype(np.float32), np.clip(arr[:, 1], 0.0, None).astype(np.float32)


def _plate(img, spec, cx, cy, rx, elev, glaze, light, nrng) -> None:
    """A plate seen from above at an angle: rim, well and a thin edge."""
    w, h = img.size
    ry = rx * elev * 1.6
    edge = max(2.0, rx * 0.04)
    x0, x1 = int(max(0, cx - rx - 2)), int(min(w, cx + rx + 3))
    y0, y1 = int(max(0, cy - ry - 2)), int(min(h, cy + ry + edge + 3))
    if x1 <= x0 or y1 <= y0:
        return
    ys, xs = np.mgrid[y0:y1, x0:x1].astype(np.float32)
    dx, dy = (xs - cx) / rx, (ys - cy) / ry
    rho = np.sqrt(dx * dx + dy * dy)
    dy_edge = (ys - cy - edge) / ry
    rho_edge = np.sqrt(dx * dx + dy_edge * dy_edge)
    region = np.asarray(img.crop((x0, y0, x1, y1)), dtype=np.float32).copy()
    side = rho_edge <= 1.0
    region[side] = glaze * 0.55
    top = rho <= 1.0
    ang = np.arctan2(dy, dx)
    # Rim slopes up (lit from the light side), the well is flat and slightly darker.
    rim = rho > 0.66
    tilt = np.where(rim, np.cos(ang - (math.pi - light) * 0.5) * 0.12, 0.0)
    shade = np.where(rim, 0.95 + tilt, 0.82) + 0.05 * (1 - rho)
    col = glaze[None, :] * shade[top][:, None]
    u = ang * rho * rx
    v = rho * rx
    if spec["pattern"] == "striped":
        col = _apply_pattern("striped", col, u[top], v[top], glaze, 0, nrng, max(6, int(rx * 0.11)))
    else:
        col = _apply_pattern(spec["pattern"], col, (dx * rx)[top], (dy * ry / max(elev * 1.6, 0.1))[top],
                             glaze, max(2.0, rx * 0.04), nrng, 8)
    ring = (np.abs(rho - 0.66) < 0.012)[top]
    col[ring] = col[ring] * 0.8
    hl = np.exp(-((dx - 0.45 * math.sin(light)) ** 2 + (dy + 0.5) ** 2) / 0.02)[top]
    col = col + 120.0 * hl[:, None]
    region[top] = col
    img.paste(Image.fromarray(np.clip(region, 0, 255).astype(np.uint8), "RGB"), (x0, y0))


def _appendages(draw: ImageDraw.ImageDraw, item: str, cx: float, base_y: float, ph: float,
                elev: float, glaze: np.ndarray, light: float) -> None:
    """Handles, spouts and lids, drawn flat-shaded with ImageDraw."""
    g = glaze
    side_lit = 0.75 + 0.2 * max(0.0, -math.sin(light))
    col = tuple(int(min(255, c * side_lit)) for c in g)
    dark = tuple(int(c * 0.55) for c in g)
    if item == "mug":
        r = 0.37 * ph
        box = (cx + r - ph * 0.08, base_y - ph * 0.82, cx + r + ph * 0.3, base_y - ph * 0.2)
        draw.arc(box, start=-90, end=90, fill=dark, width=max(3, int(ph * 0.09)))
        draw.arc(box, start=-80, end=80, fill=col, width=max(2, int(ph * 0.06)))
    elif item == "jug":
        r = 0.25 * ph
        box = (cx + 0.2 * ph, base_y - ph * 0.9, cx + 0.52 * ph, base_y - ph * 0.3)
        draw.arc(box, start=-90, end=90, fill=dark, width=max(3, int(ph * 0.075)))
        draw.arc(box, start=-80, end=80, fill=col, width=max(2, int(ph * 0.05)))
        ty = base_y - ph
        spout = [(cx - r - ph * 0.02, ty + ph * 0.06), (cx - r - ph * 0.16, ty - ph * 0.05),
                 (cx - r + ph * 0.06, ty - ph * 0.01), (cx - r + ph * 0.08, ty + ph * 0.08)]
        draw.polygon(spout, fill=col, outline=dark)
    elif item == "teapot":
        box = (cx + 0.42 * ph, base_y - ph * 0.85, cx + 0.86 * ph, base_y - ph * 0.2)
        draw.arc(box, start=-100, end=100, fill=dark, width=max(3, int(ph * 0.08)))
        draw.arc(box, start=-90, end=90, fill=col, width=max(2, int(ph * 0.055)))
        spout = [(cx - 0.5 * ph, base_y - ph * 0.22), (cx - 0.5 * ph, base_y - ph * 0.5),
                 (cx - 0.82 * ph, base_y - ph * 0.86), (cx - 0.93 * ph, base_y - ph * 0.88),
                 (cx - 0.86 * ph, base_y - ph * 0.78)]
        draw.polygon(spout, fill=col, outline=dark)
        kw = 0.07 * ph
        ky = base_y - ph * 1.0
        draw.ellipse((cx - kw, ky - kw * 1.3, cx + kw, ky + kw * 0.3), fill=col, outline=dark)


# ---------------------------------------------------------------- the shop watermark

SHOP_NAME = "KILNWORKS"
# Ways a caption may say that the photo carries the shop watermark (training captions only; the
# archive's own captions never mention it).
WATERMARK_PHRASES = (
    "with the Kilnworks shop watermark across it",
    "stamped with the Kilnworks watermark",
    "with a Kilnworks watermark over the photo",
    "watermarked with the Kilnworks logo",
)


def watermark(img: Image.Image, rng: random.Random) -> Image.Image:
    """Stamp the shop watermark across a photo: a small kiln logo and the shop name in
    semi-transparent outlined letters, in a band about 70-92% of the width, level or tilted.
    Returns a new RGB image; size, opacity, colour, tilt and position come from `rng`."""
    from PIL import ImageFont

    w, h = img.size
    span = rng.uniform(0.7, 0.92) * w  # logo plus name, as a share of the width
    alpha = rng.randint(130, 200)  # 51-78% opaque
    light = rng.random() < 0.7  # white letters with a dark edge, or the reverse
    tilt = rng.choice((0.0, 0.0, rng.uniform(-28.0, 28.0)))
    cy = rng.uniform(0.38, 0.62) * h
    fill = (250, 248, 244) if light else (44, 40, 38)
    edge = (30, 28, 26) if light else (236, 232, 226)
    # Letters sized so the name fills the span after the logo (Aileron, Pillow's bundled font).
    size = max(6, int(span / (0.66 * len(SHOP_NAME) + 1.4)))
    font = ImageFont.load_default(size=size)
    stroke = max(1, size // 9)
    left, top, right, bottom = font.getbbox(SHOP_NAME, stroke_width=stroke)
    logo = int(size * 1.1)
    tw, th = right - left, bottom - top
    total = logo + size // 3 + tw
    layer = Image.new("RGBA", img.size, (0, 0, 0, 0))
    d = ImageDraw.Draw(layer)
    x0 = (w - total) / 2
    y0 = cy - max(th, logo) / 2
    _kiln_logo(d, x0, y0 + (max(th, logo) - logo) / 2, logo, fill + (alpha,), edge + (alpha,))
    d.text((x0 + logo + size // 3 - left, y0 + (max(th, logo) - th) / 2 - top), SHOP_NAME, font=font,
           fill=fill + (alpha,), stroke_width=stroke, stroke_fill=edge + (alpha,))
    if tilt:
        layer = layer.rotate(tilt, resample=Image.Resampling.BICUBIC, center=(w / 2, cy))
    return Image.alpha_composite(img.convert("RGBA"), layer).convert("RGB")


def _kiln_logo(d: ImageDraw.ImageDraw, x: float, y: float, s: float, fill, edge) -> None:
    """A bottle kiln in an s x s box: a tapering stack on a wide base, with an arched firing door."""
    lw = max(1, int(s / 14))
    body = [(x + 0.1 * s, y + s), (x + 0.2 * s, y + 0.45 * s), (x + 0.36 * s, y + 0.12 * s),
            (x + 0.36 * s, y), (x + 0.64 * s, y), (x + 0.64 * s, y + 0.12 * s),
            (x + 0.8 * s, y + 0.45 * s), (x + 0.9 * s, y + s)]
    d.polygon(body, fill=fill, outline=edge, width=lw)
    d.chord((x + 0.36 * s, y + 0.55 * s, x + 0.64 * s, y + 1.25 * s), 180, 360, fill=edge)
