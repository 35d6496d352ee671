"""Face detectors that ship inside general-purpose packages, measured on public images.

For each detector considered (OpenCV 4.x Haar cascades from `cv2.data.haarcascades`, and
scikit-image's LBP cascade `data.lbp_frontal_face_cascade_filename()` run by `skimage.feature.Cascade`)
this prints:
- recall on the 100 faces and false-positive rate on the 100 non-faces of scikit-image's
  `data.lfw_subset()` (25x25 grey crops; labels checked by eye: the first 100 are faces, the last
  100 are not, a few of those holding part of a face), each crop upsampled to 100 px and pasted on a
  160 px canvas of its mean grey (a tight crop leaves the detector no context);
- recall by face size: the same 100 faces pasted into face-free public photos at 3-16% of the short
  side, detected at the default working size;
- which public photos get a detection: the portraits (scikit-image astronaut, matplotlib
  grace_hopper) should, the face-free photos should not;
- milliseconds per image at several long sides (medians; the machine is shared, so compare
  detectors within one run).

    .venv/bin/python bench/faces.py [--json] [--quick]
"""
from __future__ import annotations

import argparse
import json
import statistics
import sys
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))
sys.path.insert(0, str(ROOT / "bench"))

from curate.imaging.faces import FacesConfig, detect_faces  # noqa: E402

import photoset  # noqa: E402

PORTRAITS = ("astronaut", "grace_hopper")  # one frontal face each
# The cameraman (skimage `camera`) looks into his camera: a turned, occluded face. Reported apart.
TURNED = ("camera",)
FACE_FREE = ("coffee", "chelsea", "rocket", "china", "flower", "motorcycle_left", "hubble_deep_field", "coins",
             "moon", "brick", "grass", "gravel", "immunohistochemistry", "retina", "clock", "cell", "page")
HAAR = ("default", "alt", "alt2", "alt_tree")


def lfw_canvases(up: int = 100, pad: int = 30) -> list[np.ndarray]:
    """scikit-image lfw_subset crops, upsampled to `up` px and centred on a canvas of their mean grey."""
    import cv2
    from skimage import data

    crops = (data.lfw_subset() * 255).round().astype(np.uint8)
    out = []
    for c in crops:
        im = cv2.resize(c, (up, up), interpolation=cv2.INTER_CUBIC)
        out.append(cv2.copyMakeBorder(im, pad, pad, pad, pad, cv2.BORDER_CONSTANT, value=int(c.mean())))
    return out


def detectors() -> dict:
    """name -> function(image uint8 HxW or HxWx3) -> number of faces."""
    from skimage import data
    from skimage.feature import Cascade

    out = {}
    for name in HAAR:
        cfg = FacesConfig(cascade=f"haarcascade_frontalface_{name}.xml")
        out[f"haar_{name}"] = (lambda cfg: lambda im: detect_faces(im, cfg).count)(cfg)
    lbp = Cascade(data.lbp_frontal_face_cascade_filename())

    def lbp_count(im: np.ndarray) -> int:
        import cv2

        cfg = FacesConfig()
        g = im if im.ndim == 2 else cv2.cvtColor(im, cv2.COLOR_RGB2GRAY)
        s = min(1.0, cfg.work_long_side / max(g.shape))
        if s < 1:
            g = cv2.resize(g, (round(g.shape[1] * s), round(g.shape[0] * s)), interpolation=cv2.INTER_AREA)
        m = max(20, round(cfg.min_face_share * min(g.shape)))
        # scikit-image's face-detection example uses scale 1.2, step 1, and groups hits by neighbours.
        found = lbp.detect_multi_scale(g.astype(np.float64) / 255, scale_factor=1.2, step_ratio=1,
                                       min_size=(m, m), max_size=g.shape, min_neighbor_number=4)
        return len(found)

    out["skimage_lbp"] = lbp_count
    return out


def pasted_faces(size_share: float, backgrounds: list[np.ndarray], faces: np.ndarray) -> list[np.ndarray]:
    """Each lfw face (25x25) upsampled to size_share of a background's short side, pasted at its centre."""
    import cv2

    out = []
    for i, f in enumerate(faces):
        bg = backgrounds[i % len(backgrounds)].copy()
        side = max(8, round(size_share * min(bg.shape[:2])))
        face = cv2.resize(f, (side, side), interpolation=cv2.INTER_CUBIC)
        y, x = (bg.shape[0] - side) // 2, (bg.shape[1] - side) // 2 + (i % 3 - 1) * side
        bg[y:y + side, x:x + side] = face[..., None]
        out.append(bg)
    return out


def median_ms(fn, im: np.ndarray, repeat: int) -> float:
    fn(im)  # warm-up (loads the cascade)
    ts = []
    for _ in range(repeat):
        t = time.perf_counter()
        fn(im)
        ts.append((time.perf_counter() - t) * 1000)
    return statistics.median(ts)


def main() -> None:
    import cv2
    from skimage import data

    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--json", action="store_true", help="print one JSON object instead of tables")
    ap.add_argument("--quick", action="store_true", help="fewer timing repeats, no pasted-face sizes")
    args = ap.parse_args()
    dets = detectors()
    res: dict = {"lfw": {}, "photos": {}, "pasted": {}, "ms": {}}

    canv = lfw_canvases()
    for name, fn in dets.items():
        hits = np.array([fn(im) > 0 for im in canv])
        res["lfw"][name] = {"recall": float(hits[:100].mean()), "fpr": float(hits[100:].mean())}

    photos = {n: np.asarray(photoset.load_photo(n)) for n in PORTRAITS + TURNED + FACE_FREE}
    for name, fn in dets.items():
        res["photos"][name] = {n: fn(im) for n, im in photos.items()}

    if not args.quick:
        faces = (data.lfw_subset()[:100] * 255).round().astype(np.uint8)
        bgs = [photos[n] for n in ("coffee", "china", "flower", "rocket")]
        for share in (0.03, 0.05, 0.08, 0.16):
            ims = pasted_faces(share, bgs, faces)
            res["pasted"][f"{share:.2f}"] = {n: float(np.mean([fn(im) > 0 for im in ims])) for n, fn in dets.items()}

    base = photos["grace_hopper"]
    for side in (320, 640, 960, 1280):
        s = side / max(base.shape[:2])
        im = cv2.resize(base, (round(base.shape[1] * s), round(base.shape[0] * s)), interpolation=cv2.INTER_CUBIC)
        for name, fn in dets.items():
            res["ms"].setdefault(name, {})[side] = median_ms(fn, im, 3 if args.quick else 7)
    # The default detector with its working size raised: what the bounded working size saves.
    for work in (320, 480, 960, 1280):
        cfg = FacesConfig(work_long_side=work)
        s = 1280 / max(base.shape[:2])
        im = cv2.resize(base, (round(base.shape[1] * s), round(base.shape[0] * s)), interpolation=cv2.INTER_CUBIC)
        res["ms"].setdefault("default_at_work_side", {})[work] = median_ms(
            lambda x: detect_faces(x, cfg), im, 3 if args.quick else 5)

    if args.json:
        print(json.dumps(res))
        return
    print("lfw_subset (scikit-image): 100 faces, 100 non-faces, 100 px on a 160 px canvas")
    print(f"{'detector':14s} {'recall':>7s} {'FPR':>6s}")
    for name, r in res["lfw"].items():
        print(f"{name:14s} {r['recall']:7.2f} {r['fpr']:6.2f}")
    print("\npublic photos: faces found (portraits should be >= 1, face-free 0)")
    for name, r in res["photos"].items():
        port = " ".join(f"{n}={r[n]}" for n in PORTRAITS + TURNED)
        ff = [n for n in FACE_FREE if r[n] > 0]
        print(f"{name:14s} {port}  face-free photos with a hit: {len(ff)}/{len(FACE_FREE)} {' '.join(ff)}")
    if res["pasted"]:
        print("\nrecall of lfw faces pasted into face-free photos, by face side / short side")
        print(f"{'detector':14s} " + " ".join(f"{k:>6s}" for k in res["pasted"]))
        for name in dets:
            print(f"{name:14s} " + " ".join(f"{res['pasted'][k][name]:6.2f}" for k in res["pasted"]))
    print("\nms per image (median), grace_hopper resized to each long side; default working side 640")
    sides = list(res["ms"]["haar_alt2"])
    print(f"{'detector':14s} " + " ".join(f"{s:>7d}" for s in sides))
    for name in dets:
        print(f"{name:14s} " + " ".join(f"{res['ms'][name][s]:7.1f}" for s in sides))
    print("\nalt2 on a 1280 px image, by working long side (ms)")
    print("  " + "  ".join(f"{k}: {v:.1f}" for k, v in res["ms"]["default_at_work_side"].items()))


if __name__ == "__main__":
    main()
