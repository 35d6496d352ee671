"""Watermark / text-overlay signal on public photos: precision-recall curve and recall per stamp.

Photos come from bench/photoset.py (scikit-image, scikit-learn and matplotlib samples). Each photo
is scored clean, then stamped with Pillow: text (`ImageFont.load_default(size=...)`) or a logo
(ring with an initial, then text) at three sizes (3, 6, 12% of the image height), three opacities
(30, 60, 100%), six positions (four corners, a centre band, diagonal text tiled over the image)
and two colours (white, black). The photos are split in two: TUNE_PHOTOS chose the defaults of
curate.imaging.overlay.OverlayConfig; HELD_OUT_PHOTOS were kept out of that and are what the
figures report (add --tune to see the tuning photos instead).

    .venv/bin/python bench/watermark.py [--tune] [--json]
"""
from __future__ import annotations

import argparse
import dataclasses
import hashlib
import json
import sys
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))
sys.path.insert(0, str(ROOT / "bench"))

import photoset  # noqa: E402

# Photos whose clean and stamped versions chose the defaults (scikit-image, and scikit-learn's china.jpg,
# moved here after a first look showed its pagoda railings scoring as text).
TUNE_PHOTOS = ("astronaut", "camera", "coffee", "chelsea", "coins", "brick", "grass", "hubble_deep_field",
               "immunohistochemistry", "moon", "china")
# Photos kept out of tuning: every figure printed by default comes from these.
HELD_OUT_PHOTOS = ("flower", "grace_hopper", "rocket", "motorcycle_left", "gravel", "retina",
                   "clock", "cell")

SIZES = (0.03, 0.06, 0.12)  # text height as a share of the image height
OPACITIES = (0.3, 0.6, 1.0)
POSITIONS = ("top_left", "top_right", "bottom_left", "bottom_right", "centre", "tiled")
COLOURS = {"white": (255, 255, 255), "black": (0, 0, 0)}
KINDS = ("text", "logo")
# Invented marks for the synthetic stamps.
WORDS = ("© Larkspur Images", "stockframe.example", "PROOF - Meridian", "© 2021 Halden Studio",
         "sample | pixgrove", "Tallis Photo Agency")


@dataclasses.dataclass(frozen=True)
class Stamp:
    size: float
    opacity: float
    position: str
    colour: str
    kind: str

    @property
    def name(self) -> str:
        return f"{self.kind}/{self.position}/{self.colour}/s{round(self.size * 100)}/o{round(self.opacity * 100)}"


def all_stamps() -> list[Stamp]:
    return [Stamp(s, o, p, c, k) for s in SIZES for o in OPACITIES for p in POSITIONS for c in COLOURS
            for k in KINDS]


def _pick(seq, key: str):
    return seq[int(hashlib.sha256(key.encode()).hexdigest(), 16) % len(seq)]


def stamp_image(rgb: np.ndarray, st: Stamp, key: str = "") -> tuple[np.ndarray, tuple[int, int, int, int]]:
    """The photo with one stamp drawn on it, and the stamp's box (x, y, w, h) in pixels."""
    from PIL import Image, ImageDraw, ImageFont

    h, w = rgb.shape[:2]
    size = max(6, round(st.size * h))
    font = ImageFont.load_default(size=size)
    text = _pick(WORDS, key + st.name)
    alpha = round(255 * st.opacity)
    fill = COLOURS[st.colour] + (alpha,)
    base = Image.fromarray(rgb).convert("RGBA")
    layer = Image.new("RGBA", base.size, (0, 0, 0, 0))
    if st.position == "tiled":
        tx0, ty0, tx1, ty1 = font.getbbox(text)
        tile = Image.new("RGBA", (tx1 + size, ty1 + size // 2), (0, 0, 0, 0))
        ImageDraw.Draw(tile).text((size // 2, 0), text, font=font, fill=fill)
        tile = tile.rotate(30, expand=True, resample=Image.Resampling.BICUBIC)
        step_x, step_y = tile.width, max(tile.height // 2, 3 * size)
        for row, y in enumerate(range(-tile.height // 2, h, step_y)):
            for x in range(-tile.width // 2 + (row % 2) * step_x // 2, w, step_x):
                layer.alpha_composite(tile, (max(x, 0), max(y, 0)), (max(-x, 0), max(-y, 0)))
        box = (0, 0, w, h)
    else:
        d = ImageDraw.Draw(layer)
        ring = round(size * 1.3) if st.kind == "logo" else 0
        gap = round(size * 0.4) if ring else 0
        tx0, ty0, tx1, ty1 = font.getbbox(text)
        bw, bh = ring + gap + tx1, max(ring, ty1)
        m = round(0.03 * min(w, h))
        if bw > w - 2 * m:  # a mark longer than the photo is cut short, as a stamper would
            text = text[: max(3, int(len(text) * (w - 2 * m - ring - gap) / max(tx1, 1)))]
            tx0, ty0, tx1, ty1 = font.getbbox(text)
            bw = ring + gap + tx1
        x = {"top_left": m, "bottom_left": m, "top_right": w - m - bw, "bottom_right": w - m - bw}.get(
            st.position, (w - bw) // 2)
        y = {"top_left": m, "top_right": m, "bottom_left": h - m - bh, "bottom_right": h - m - bh}.get(
            st.position, (h - bh) // 2)
        if ring:
            lw = max(1, round(ring / 12))
            d.ellipse((x, y + (bh - ring) // 2, x + ring, y + (bh - ring) // 2 + ring), outline=fill, width=lw)
            ini = ImageFont.load_default(size=max(6, round(ring * 0.6)))
            d.text((x + ring / 2, y + bh / 2), next(c for c in text if c.isalpha()).upper(), font=ini, fill=fill, anchor="mm")
        d.text((x + ring + gap, y + (bh - ty1) // 2), text, font=font, fill=fill)
        x0, y0, x1, y1 = layer.getchannel("A").getbbox() or (x, y, x + bw, y + bh)  # the ink, not the line box
        box = (x0, y0, x1 - x0, y1 - y0)
    out = Image.alpha_composite(base, layer).convert("RGB")
    return np.asarray(out), box


def load_rgb(name: str) -> np.ndarray:
    return np.asarray(photoset.load_photo(name))


def clean_variants(rgb: np.ndarray) -> list[tuple[str, np.ndarray]]:
    """The clean photo and copies a corpus holds: four 70% crops, a mirror image, half size."""
    import cv2

    h, w = rgb.shape[:2]
    ch, cw = int(h * 0.7), int(w * 0.7)
    half = cv2.resize(rgb, (w // 2, h // 2), interpolation=cv2.INTER_AREA)
    return [("original", rgb), ("crop_tl", rgb[:ch, :cw]), ("crop_tr", rgb[:ch, w - cw:]),
            ("crop_bl", rgb[h - ch:, :cw]), ("crop_br", rgb[h - ch:, w - cw:]), ("mirror", rgb[:, ::-1]),
            ("half", half)]


def covers(found: tuple[int, int, int, int] | None, truth: tuple[int, int, int, int], share: float = 0.5) -> bool:
    """Whether the reported box covers at least `share` of the stamp's box."""
    if found is None:
        return False
    fx, fy, fw, fh = found
    tx, ty, tw, th = truth
    ix = max(0, min(fx + fw, tx + tw) - max(fx, tx))
    iy = max(0, min(fy + fh, ty + th) - max(fy, ty))
    return ix * iy >= share * tw * th


def score_set(photos: tuple[str, ...], cfg) -> tuple[list[dict], list[dict]]:
    """Clean records (photo, variant, score, area) and stamped records (photo, stamp, score, box, truth)."""
    from curate.imaging.overlay import overlay_signal

    clean, stamped = [], []
    for name in photos:
        rgb = load_rgb(name)
        orig = overlay_signal(rgb, cfg)
        for var, im in clean_variants(rgb):
            r = orig if var == "original" else overlay_signal(np.ascontiguousarray(im), cfg)
            clean.append({"photo": name, "variant": var, "score": r.score, "area": r.area_share, "where": r.where})
        for st in all_stamps():
            im, truth = stamp_image(rgb, st, name)
            r = overlay_signal(im, cfg)
            stamped.append({"photo": name, "stamp": st, "score": r.score, "box": r.box, "truth": truth,
                            "area": r.area_share, "clean_area": orig.area_share})
    return clean, stamped


def curve(clean: list[dict], stamped: list[dict], thresholds) -> list[dict]:
    cs = np.array([r["score"] for r in clean])
    ss = np.array([r["score"] for r in stamped])
    clear = np.array([r["stamp"].size >= 0.06 and r["stamp"].opacity >= 0.6 and r["stamp"].position != "tiled"
                      for r in stamped])
    rows = []
    for t in thresholds:
        tp, fp = int((ss >= t).sum()), int((cs >= t).sum())
        rows.append({"threshold": round(float(t), 2), "precision": tp / (tp + fp) if tp + fp else 1.0,
                     "recall": tp / len(ss), "recall_clear": float((ss[clear] >= t).mean()),
                     "false_alarms": fp, "clean": len(cs)})
    return rows


def breakdown(stamped: list[dict], threshold: float) -> dict:
    """Recall at the threshold per stamp attribute, per size x opacity, and how often the box is right."""
    out: dict = {}
    for attr in ("size", "opacity", "position", "colour", "kind"):
        vals: dict = {}
        for r in stamped:
            vals.setdefault(getattr(r["stamp"], attr), []).append(r["score"] >= threshold)
        out[attr] = {str(k): float(np.mean(v)) for k, v in vals.items()}
    grid: dict = {}
    for r in stamped:
        if r["stamp"].position != "tiled":
            grid.setdefault(f"s{round(r['stamp'].size * 100)}/o{round(r['stamp'].opacity * 100)}", []).append(
                r["score"] >= threshold)
    out["size_x_opacity"] = {k: float(np.mean(v)) for k, v in grid.items()}
    photo: dict = {}
    for r in stamped:
        if r["stamp"].size >= 0.06 and r["stamp"].opacity >= 0.6 and r["stamp"].position != "tiled":
            photo.setdefault(r["photo"], []).append(r["score"] >= threshold)
    out["clear_by_photo"] = {k: float(np.mean(v)) for k, v in photo.items()}
    hits = [r for r in stamped if r["score"] >= threshold and r["stamp"].position != "tiled"]
    out["box_covers_stamp"] = float(np.mean([covers(r["box"], r["truth"]) for r in hits])) if hits else 0.0
    out["area_more_than_clean"] = float(np.mean([r["area"] > r["clean_area"] for r in stamped]))
    return out


def timing(cfg, repeat: int = 5) -> dict:
    """Median ms per image by image long side (a photo resized), with the default working size."""
    import statistics

    import cv2

    from curate.imaging.overlay import overlay_signal

    base = load_rgb("astronaut")
    out = {}
    for side in (512, 768, 1024, 2048):
        im = cv2.resize(base, (side, side), interpolation=cv2.INTER_CUBIC)
        overlay_signal(im, cfg)
        ts = []
        for _ in range(repeat):
            t = time.perf_counter()
            overlay_signal(im, cfg)
            ts.append((time.perf_counter() - t) * 1000)
        out[side] = statistics.median(ts)
    return out


def main() -> None:
    from curate.imaging.overlay import OverlayConfig

    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--tune", action="store_true", help="report the tuning photos instead of the held-out ones")
    ap.add_argument("--json", action="store_true", help="print one JSON object instead of tables")
    ap.add_argument("--work-long-side", type=int, default=None, help="override OverlayConfig.work_long_side")
    args = ap.parse_args()
    cfg = OverlayConfig()
    if args.work_long_side:
        cfg.work_long_side = args.work_long_side
    photos = TUNE_PHOTOS if args.tune else HELD_OUT_PHOTOS
    t0 = time.perf_counter()
    clean, stamped = score_set(photos, cfg)
    seconds = time.perf_counter() - t0
    thresholds = [round(t, 2) for t in np.arange(0.1, 1.0, 0.05)]
    rows = curve(clean, stamped, thresholds)
    bd = breakdown(stamped, cfg.threshold)
    ms = timing(cfg)
    alarms = [f"{r['photo']}/{r['variant']}={r['score']:.2f}" for r in clean if r["score"] >= cfg.threshold]
    if args.json:
        print(json.dumps({"photos": list(photos), "curve": rows, "at_default": bd, "false_alarms": alarms,
                          "ms_per_image": ms, "images": len(clean) + len(stamped), "seconds": seconds}))
        return
    print(f"photos ({'tuning' if args.tune else 'held out of tuning'}): {', '.join(photos)}")
    print(f"{len(clean)} clean images (original, 4 crops, mirror, half size), {len(stamped)} stamped "
          f"({len(all_stamps())} stamps per photo); {seconds:.0f} s")
    print("\nthreshold precision recall recall_clear false_alarms")
    for r in rows:
        mark = "  <- default" if r["threshold"] == round(cfg.threshold, 2) else ""
        print(f"{r['threshold']:9.2f} {r['precision']:9.3f} {r['recall']:6.3f} {r['recall_clear']:12.3f} "
              f"{r['false_alarms']:5d}/{r['clean']}{mark}")
    print("(recall_clear: stamps of size >= 6% and opacity >= 60%, not tiled)")
    print(f"\nrecall at the default threshold {cfg.threshold}:")
    for attr in ("size", "opacity", "position", "colour", "kind"):
        print(f"  {attr:9s} " + "  ".join(f"{k}={v:.2f}" for k, v in bd[attr].items()))
    print("  size/opacity (not tiled) " + "  ".join(f"{k}={v:.2f}" for k, v in bd["size_x_opacity"].items()))
    print("  clear stamps by photo    " + "  ".join(f"{k}={v:.2f}" for k, v in bd["clear_by_photo"].items()))
    print(f"  reported box covers >= half the stamp (found, not tiled): {bd['box_covers_stamp']:.2f}")
    print(f"  overlay area larger on the stamped copy than on the clean photo: {bd['area_more_than_clean']:.2f}")
    print(f"false alarms at the default: {', '.join(alarms) or 'none'}")
    print("\nms per image (median) by image side, working long side " + str(cfg.work_long_side) + ": "
          + "  ".join(f"{k}px={v:.0f}" for k, v in ms.items()))


if __name__ == "__main__":
    main()
