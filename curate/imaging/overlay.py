"""A model-free watermark / text-overlay signal on one decoded RGB image (flag code `watermark`).

Stamped text is a row of thin, high-contrast strokes of one polarity (lighter or darker than what
lies under it), character-sized, aligned on a line, and denser there than anywhere else in the
photo. The signal finds exactly that, with no learned model, so it works beside any CLIP model:

1. grey copy at a bounded size; white and black top-hat transforms with a disc a little wider than
   a stroke keep only features thinner than the disc (strokes), with their contrast to the local
   background;
2. each polarity is cut at a few contrast levels; connected pieces of character height and shape
   are the character candidates;
3. candidates of one polarity and level, of similar height, side by side on one line, are linked
   into lines;
4. each line gets a score in [0, 1], the product of six terms: more characters, aligned tops or
   bottoms, strong contrast, stroke pixels concentrated on the line rather than spread over the
   photo (isolation), characters side by side rather than stacked, and strokes filling their boxes
   as letters do;
5. overlapping lines (one text found at several levels and in both polarities) form a region
   scored 1 - prod(1 - line score); the image scores its best region, whose box is reported.

The defaults were chosen on stamped and clean copies of public photos (scikit-image astronaut,
camera, coffee, chelsea, coins, brick, grass, hubble_deep_field, immunohistochemistry, moon;
scikit-learn china.jpg) and measured on others kept out of that (scikit-learn flower.jpg,
matplotlib grace_hopper.jpg, scikit-image rocket, motorcycle_left, gravel, retina, clock, cell):
bench/watermark.py prints the precision-recall curve and the recall per stamp size, opacity,
position and colour. It misses faint (30% opacity) stamps, text over busy texture (grass, gravel),
stamps in colours close to the photo beneath, and text tiled diagonally over the whole photo (lines
are found horizontally only); it fires on real text in the scene (signs, name badges, printed
pages) and on rows of small, regular, high-contrast objects (a bar of medal ribbons, railings).
The `watermark` flag is a screening aid for human review, not a guarantee.
"""
from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np

from curate.checks import check

CODE = "watermark"


@dataclass
class OverlayConfig:
    enabled: bool = True
    # Flag when the image score reaches this: above every clean tuning image (originals, crops, mirror
    # and half-size copies; the highest scored 0.53), chosen before the held-out photos were scored.
    threshold: float = 0.6
    # Analysis runs on a grey copy whose long side is at most this many pixels; boxes are mapped back.
    # On the held-out photos 512 found 0.36 of all stamps against 0.41 at 768 (3%-high stamps 0.28
    # against 0.37) in about half the time on large images (bench/watermark.py --work-long-side 512).
    work_long_side: int = 768
    # Top-hat disc diameter as a share of the short side: strokes thinner than this are kept
    # (a 12%-high font has strokes of about 1% of the image height; common practice for text strokes).
    stroke_max_share: float = 0.02
    # Contrast cut levels in grey levels (0-255) above the local background; several levels keep
    # text over busy backgrounds apart from the texture (tuned on the tuning photos).
    contrast_levels: tuple[int, ...] = (30, 60, 100)
    # Character height limits as a share of the short side (a 3% font at 768 px is still ~8 px).
    min_char_share: float = 0.01
    max_char_share: float = 0.2
    # A candidate wider than this many times its height is a line or an edge, not a character or a
    # few joined characters.
    max_char_aspect: float = 6.0
    # Least share of its bounding box a character's strokes fill (thin curves fill less).
    min_char_fill: float = 0.1
    # Linking: gap between neighbours <= link_gap x height, centres within link_dy x height
    # vertically, heights within a factor link_height_ratio (common practice for text lines).
    link_gap: float = 1.0
    link_dy: float = 0.35
    link_height_ratio: float = 2.0
    # Fewest characters on a line.
    min_chars: int = 3
    # Line score terms (tuned on the tuning photos): characters beyond 2 saturate with this scale,
    count_scale: float = 4.0
    # tops or bottoms within this share of the height score full alignment, and this much more none,
    align_ok: float = 0.15
    align_span: float = 0.35
    # contrast from contrast_floor reaches full weight contrast_span grey levels higher,
    contrast_floor: float = 30.0
    contrast_span: float = 60.0
    # stroke density off the line over on the line: 0 scores full isolation, this value none.
    isolation_span: float = 0.8
    # characters side by side: the share of their summed widths not overlapping another, from
    # apart_floor (none) to apart_floor + apart_span (full); stacked edges of roofs and railings overlap,
    apart_floor: float = 0.6
    apart_span: float = 0.3
    # and the median share of its box a character's strokes fill, from fill_floor to fill_floor + fill_span.
    fill_floor: float = 0.2
    fill_span: float = 0.15
    # Lines scoring below this are ignored; overlapping lines (one text found at several contrast
    # levels and both polarities) form a region scored 1 - prod(1 - line score); the image scores its
    # best region.
    line_floor: float = 0.1
    # Most lines kept per image (the ones with most characters), bounding the work on textures.
    max_lines: int = 40

    def validate(self) -> None:
        if not 0.0 <= self.threshold <= 1.0:
            raise ValueError(f"overlay.threshold must be in [0, 1], got {self.threshold}")
        if self.work_long_side < 64:
            raise ValueError(f"overlay.work_long_side must be >= 64, got {self.work_long_side}")
        if not self.contrast_levels or any(not 0 < t < 255 for t in self.contrast_levels):
            raise ValueError("overlay.contrast_levels must be grey levels between 0 and 255")
        if not 0 < self.min_char_share < self.max_char_share <= 1:
            raise ValueError("overlay.min_char_share and max_char_share must satisfy 0 < min < max <= 1")
        if self.min_chars < 2:
            raise ValueError(f"overlay.min_chars must be >= 2, got {self.min_chars}")
        if min(self.stroke_max_share, self.count_scale, self.align_span, self.contrast_span,
               self.isolation_span, self.link_gap, self.link_dy) <= 0 or self.link_height_ratio <= 1:
            raise ValueError("overlay scale parameters must be positive (link_height_ratio > 1)")


@dataclass
class OverlayResult:
    """Overlay evidence in one image; box (x, y, w, h) in original pixels, None when no line counts."""

    score: float = 0.0
    box: tuple[int, int, int, int] | None = None
    # Where the box sits: top_left, top, top_right, left, centre, right, bottom_left, bottom,
    # bottom_right, a band (top_band, centre_band, bottom_band: two thirds of the width or more),
    # spread (four or more strong regions spanning half the image or more) or none.
    where: str = "none"
    # Share of the image area covered by the boxes of all lines that count (near-duplicate keepers
    # prefer the copy with less); compare it between copies of one picture, not across pictures.
    area_share: float = 0.0
    # Lines in the reported region, and characters on its longest line.
    lines: int = 0
    chars: int = 0
    line_boxes: list[tuple[int, int, int, int]] = field(default_factory=list)


def _grey_work(rgb: np.ndarray, long_side: int) -> tuple[np.ndarray, float]:
    import cv2

    a = np.asarray(rgb)
    if a.dtype != np.uint8 or a.ndim not in (2, 3) or (a.ndim == 3 and a.shape[2] not in (3, 4)):
        raise ValueError(f"expected an HxW or HxWx3 uint8 image, got {a.dtype} {a.shape}")
    g = a if a.ndim == 2 else cv2.cvtColor(np.ascontiguousarray(a[..., :3]), cv2.COLOR_RGB2GRAY)
    h, w = g.shape
    s = min(1.0, long_side / max(h, w, 1))
    if s < 1.0:
        g = cv2.resize(g, (max(1, round(w * s)), max(1, round(h * s))), interpolation=cv2.INTER_AREA)
    return np.ascontiguousarray(g), s


def _candidates(g: np.ndarray, cfg: OverlayConfig) -> np.ndarray:
    """Character candidates, one row each: x, y, w, h, stroke area, family (polarity x level), contrast."""
    import cv2

    short = min(g.shape)
    k = max(3, int(round(cfg.stroke_max_share * short)) | 1)
    disc = cv2.getStructuringElement(cv2.MORPH_ELLIPSE, (k, k))
    hmin, hmax = max(3.0, cfg.min_char_share * short), cfg.max_char_share * short
    rows = []
    for pol, op in enumerate((cv2.MORPH_TOPHAT, cv2.MORPH_BLACKHAT)):
        resp = cv2.morphologyEx(g, op, disc)
        flat = resp.ravel().astype(np.float64)
        for lv, level in enumerate(cfg.contrast_levels):
            n, lab, st, _ = cv2.connectedComponentsWithStats((resp > level).astype(np.uint8), connectivity=8)
            x, y, w, h, a = (st[:, i].astype(np.float64) for i in range(5))
            ok = (h >= hmin) & (h <= hmax) & (w >= 2) & (w <= cfg.max_char_aspect * h) & (a >= cfg.min_char_fill * w * h)
            ok[0] = False  # label 0 is the background
            idx = np.nonzero(ok)[0]
            if len(idx) == 0:
                continue
            mean_resp = np.bincount(lab.ravel(), weights=flat, minlength=n)[idx] / a[idx]
            fam = np.full(len(idx), pol * len(cfg.contrast_levels) + lv, dtype=np.float64)
            rows.append(np.column_stack([x[idx], y[idx], w[idx], h[idx], a[idx], fam, mean_resp]))
    return np.vstack(rows) if rows else np.zeros((0, 7))


def _link(c: np.ndarray, cfg: OverlayConfig) -> list[np.ndarray]:
    """Indices of the candidates on each line (same family, side by side, similar height)."""
    from scipy.sparse import coo_matrix
    from scipy.sparse.csgraph import connected_components

    lines: list[np.ndarray] = []
    for fam in np.unique(c[:, 5]):
        ii = np.nonzero(c[:, 5] == fam)[0]
        if len(ii) < cfg.min_chars:
            continue
        x, y, w, h = (c[ii, j] for j in range(4))
        cy = y + h / 2
        hm = np.maximum(h[:, None], h[None, :])
        gap = np.maximum(x[:, None], x[None, :]) - np.minimum((x + w)[:, None], (x + w)[None, :])
        adj = ((np.abs(cy[:, None] - cy[None, :]) < cfg.link_dy * hm) & (gap < cfg.link_gap * hm)
               & (h[:, None] < cfg.link_height_ratio * h[None, :]) & (h[None, :] < cfg.link_height_ratio * h[:, None]))
        np.fill_diagonal(adj, False)
        a, b = np.nonzero(adj)
        _, lab = connected_components(coo_matrix((np.ones(len(a)), (a, b)), shape=(len(ii), len(ii))), directed=False)
        order = np.argsort(lab, kind="stable")
        for grp in np.split(order, np.nonzero(np.diff(lab[order]))[0] + 1):
            if len(grp) >= cfg.min_chars:
                lines.append(ii[grp])
    return lines


def _clip01(v: float) -> float:
    return min(1.0, max(0.0, v))


def _line_features(c: np.ndarray, idx: np.ndarray, fam_area: float, image_area: float) -> dict:
    """What the line score is made of, for one line of candidates (working-size pixels)."""
    x, y, w, h, a, _, resp = (c[idx, j] for j in range(7))
    x0, y0, x1, y1 = x.min(), y.min(), (x + w).max(), (y + h).max()
    box_area = max((x1 - x0) * (y1 - y0), 1.0)
    hmed = float(np.median(h))
    # Share of the candidates' summed widths not overlapping one another: characters sit side by side.
    o = np.argsort(x)
    xe = np.maximum.accumulate((x + w)[o])
    union = float(np.sum(np.minimum(w[o][1:], np.clip((x + w)[o][1:] - xe[:-1], 0, None)))) + float(w[o][0])
    return {
        "n": int(len(idx)),
        "box": (float(x0), float(y0), float(x1 - x0), float(y1 - y0)),
        "align": min(float(np.std(y)), float(np.std(y + h))) / hmed,
        "contrast": float(resp.mean()),
        "on_line": float(a.sum() / box_area),
        "off_line": float((fam_area - a.sum()) / max(image_area - box_area, 1.0)),
        "fill": float(np.median(a / (w * h))),
        "side_by_side": union / float(w.sum()),
        "hmed": hmed,
    }


def _line_score(f: dict, cfg: OverlayConfig) -> float:
    count = 1.0 - math.exp(-(f["n"] - 2) / cfg.count_scale)
    aligned = _clip01(1.0 - (f["align"] - cfg.align_ok) / cfg.align_span)
    contrast = _clip01((f["contrast"] - cfg.contrast_floor) / cfg.contrast_span)
    isolated = _clip01(1.0 - (f["off_line"] / max(f["on_line"], 1e-9)) / cfg.isolation_span)
    apart = _clip01((f["side_by_side"] - cfg.apart_floor) / cfg.apart_span)
    filled = _clip01((f["fill"] - cfg.fill_floor) / cfg.fill_span)
    return count * count * aligned * contrast * isolated * apart * filled


def _regions(boxes: list[tuple[float, float, float, float]]) -> list[list[int]]:
    """Indices of overlapping boxes, grouped (transitively)."""
    parent = list(range(len(boxes)))

    def root(i: int) -> int:
        while parent[i] != i:
            parent[i] = parent[parent[i]]
            i = parent[i]
        return i

    for i, (ax, ay, aw, ah) in enumerate(boxes):
        for j in range(i + 1, len(boxes)):
            bx, by, bw, bh = boxes[j]
            if ax < bx + bw and bx < ax + aw and ay < by + bh and by < ay + ah:
                parent[root(i)] = root(j)
    groups: dict[int, list[int]] = {}
    for i in range(len(boxes)):
        groups.setdefault(root(i), []).append(i)
    return list(groups.values())


def _where(box: tuple[float, float, float, float], w: int, h: int) -> str:
    bx, by, bw, bh = box
    cx, cy = (bx + bw / 2) / w, (by + bh / 2) / h
    row = "top" if cy < 1 / 3 else ("bottom" if cy > 2 / 3 else "centre")
    if bw >= 2 / 3 * w:
        return f"{row}_band"
    col = "left" if cx < 1 / 3 else ("right" if cx > 2 / 3 else "")
    if row == "centre":
        return col or "centre"
    return f"{row}_{col}" if col else row


def overlay_signal(rgb: np.ndarray, cfg: OverlayConfig | None = None) -> OverlayResult:
    """Text-overlay evidence in an upright RGB (or grey) uint8 image: score in [0, 1] and where it is."""
    cfg = cfg or OverlayConfig()
    g, s = _grey_work(rgb, cfg.work_long_side)
    H, W = np.asarray(rgb).shape[:2]
    if min(g.shape) < 16:
        return OverlayResult()
    c = _candidates(g, cfg)
    if len(c) < cfg.min_chars:
        return OverlayResult()
    fam_area = {f: float(c[c[:, 5] == f, 4].sum()) for f in np.unique(c[:, 5])}
    lines = sorted(_link(c, cfg), key=len, reverse=True)[: cfg.max_lines]
    scored = []
    for idx in lines:
        f = _line_features(c, idx, fam_area[c[idx[0], 5]], float(g.size))
        sc = _line_score(f, cfg)
        if sc >= cfg.line_floor:
            scored.append((sc, f["n"], f["box"]))
    if not scored:
        return OverlayResult()
    regions = _regions([b for _, _, b in scored])
    reg_scores = [1.0 - float(np.prod([1.0 - scored[i][0] for i in r])) for r in regions]
    best = int(np.argmax(reg_scores))
    members = regions[best]
    boxes = [scored[i][2] for i in members]
    region = [min(b[0] for b in boxes), min(b[1] for b in boxes),
              max(b[0] + b[2] for b in boxes), max(b[1] + b[3] for b in boxes)]
    mask = np.zeros(g.shape, dtype=bool)
    for _, _, (bx, by, bw, bh) in scored:
        mask[int(by):int(math.ceil(by + bh)), int(bx):int(math.ceil(bx + bw))] = True
    # Text tiled over the photo: several strong regions whose boxes span half the image or more.
    strong = [r for r, v in zip(regions, reg_scores) if v >= 0.5 * reg_scores[best]]
    every = [scored[i][2] for r in strong for i in r]
    ux0, uy0 = min(b[0] for b in every), min(b[1] for b in every)
    ux1, uy1 = max(b[0] + b[2] for b in every), max(b[1] + b[3] for b in every)
    spread = len(strong) >= 4 and (ux1 - ux0) * (uy1 - uy0) >= 0.5 * g.size
    if spread:
        region = [ux0, uy0, ux1, uy1]

    def back(b: list[float] | tuple[float, ...], corners: bool = True) -> tuple[int, int, int, int]:
        x0, y0, x1, y1 = (b if corners else (b[0], b[1], b[0] + b[2], b[1] + b[3]))
        X0, Y0 = max(0, int(math.floor(x0 / s))), max(0, int(math.floor(y0 / s)))
        X1, Y1 = min(W, int(math.ceil(x1 / s))), min(H, int(math.ceil(y1 / s)))
        return X0, Y0, X1 - X0, Y1 - Y0

    box = back(region)
    return OverlayResult(
        score=reg_scores[best],
        box=box,
        where="spread" if spread else _where(box, W, H),
        area_share=float(mask.mean()),
        lines=len(members),
        chars=max(scored[i][1] for i in members),
        line_boxes=[back(b, corners=False) for b in boxes],
    )


def overlay_check(result: OverlayResult, cfg: OverlayConfig | None = None) -> dict:
    """The check record of the `watermark` flag: passes while the score stays under the threshold."""
    cfg = cfg or OverlayConfig()
    if result.box is None:
        detail = "no text-like line found"
    else:
        x, y, w, h = result.box
        detail = (f"{result.where} at x={x} y={y} w={w} h={h}; {result.lines} line(s), best {result.chars} "
                  f"characters; overlay area {result.area_share:.1%}")
    return check(CODE, value=round(result.score, 4), threshold=cfg.threshold, op="<", unit="score", detail=detail)
