"""Frontal-face detection and face blurring on one decoded RGB image (flag code `face`).

Detector: OpenCV's frontal-face Haar cascade `haarcascade_frontalface_alt2.xml`, which ships inside
the opencv-python(-headless) 4.x wheels under `cv2.data.haarcascades` (nothing is downloaded).
Chosen by measurement (bench/faces.py, one run, same settings for all):
- scikit-image `data.lfw_subset()`, crops upsampled to 100 px on a 160 px canvas: recall on the 100
  faces 0.98 for alt2 and `default`, 0.97 `alt`, 0.91 scikit-image's LBP cascade
  (`skimage.feature.Cascade`), 0.32 `alt_tree`; no detector fired on the 100 non-face crops;
- 17 face-free public photos: alt2, alt and alt_tree fired on none, `default` on 3 (coins, moon,
  cell), LBP on 6 (and put 4 boxes on the one-face astronaut portrait);
- the same faces pasted into face-free photos at 5 / 8 / 16% of the short side: alt2 found
  0.30 / 0.78 / 0.97 of them, the most of the Haar cascades;
- speed at a 640 px working side, relative to alt2: `default` 1.1x, `alt` 1.2x, LBP 2.9x the time.

Each box's score is its neighbour count: how many overlapping detector windows were merged into it
(OpenCV `detectMultiScale2`). Real faces collect tens; chance hits on texture collect a few, which
is what `min_neighbors` rejects.

Caution: a frontal-face cascade misses small, turned (profile), tilted and occluded faces, and face
detectors fail more often for some groups of people (e.g. Dooley et al. 2021, "Robustness
Disparities in Commercial Face Detection", from memory). The `face` flag is a
screening aid for human review, not a guarantee that an image holds no face; local law, consent
and the data's licences decide what may be used.
"""
from __future__ import annotations

import functools
from dataclasses import dataclass, field

import numpy as np

from curate.checks import check

CODE = "face"


@dataclass
class FacesConfig:
    enabled: bool = True
    # Cascade file under cv2.data.haarcascades; alt2 chosen by bench/faces.py (see the module docstring).
    cascade: str = "haarcascade_frontalface_alt2.xml"
    # Detection runs on a copy whose long side is at most this many pixels; boxes are mapped back.
    # At 640 a face of 5% of a 3:2 photo's short side is ~21 px, just over the cascade's 20 px window;
    # 480 runs ~1.4x faster but loses those faces (bench/faces.py).
    work_long_side: int = 640
    # Smallest face side counted, as a share of the image's short side (common practice: faces
    # below ~20-30 px are rarely identifiable); never below the cascade's own 20 px window.
    min_face_share: float = 0.04
    # Scale step of the detector's image pyramid; 1.1 is OpenCV's default and tutorial value.
    scale_factor: float = 1.1
    # Overlapping windows a face needs; the OpenCV tutorial uses 3-5. With 5, alt2 fired on none of the
    # face-free photos in bench/faces.py; in a trial run at 2, chance hits on flower.jpg and the coins
    # collected 3-4 windows each, the two portraits' faces 23 and 36.
    min_neighbors: int = 5
    # Equalise the grey histogram before detection, as the OpenCV face-detection tutorial does.
    equalize: bool = True
    # Boxes overlapping more than this (intersection over union) are one face (common practice: 0.3-0.5).
    nms_iou: float = 0.3
    # A box whose area lies at least this share inside a higher-scoring box is dropped (nested duplicates).
    nms_contain: float = 0.7
    # Blur: each box is widened by this share of its width/height on every side before blurring, so
    # hair line, ears and chin go too (common practice; the detector's box is tight around the face).
    blur_margin: float = 0.2
    # Gaussian sigma as a share of the widened box's longer side (common practice: strong enough
    # that no facial feature survives at the box's own scale).
    blur_sigma_share: float = 0.12

    def validate(self) -> None:
        if self.work_long_side < 64:
            raise ValueError(f"faces.work_long_side must be >= 64, got {self.work_long_side}")
        if not 0.0 <= self.min_face_share < 1.0:
            raise ValueError(f"faces.min_face_share must be in [0, 1), got {self.min_face_share}")
        if self.scale_factor <= 1.0:
            raise ValueError(f"faces.scale_factor must be > 1, got {self.scale_factor}")
        if self.min_neighbors < 0:
            raise ValueError(f"faces.min_neighbors must be >= 0, got {self.min_neighbors}")
        if not 0.0 < self.nms_iou <= 1.0 or not 0.0 < self.nms_contain <= 1.0:
            raise ValueError("faces.nms_iou and faces.nms_contain must be in (0, 1]")
        if self.blur_margin < 0 or self.blur_sigma_share <= 0:
            raise ValueError("faces.blur_margin must be >= 0 and faces.blur_sigma_share > 0")


@dataclass
class FaceResult:
    """Faces found in one image: boxes (x, y, w, h) in original pixels, best first."""

    boxes: list[tuple[int, int, int, int]] = field(default_factory=list)
    # Neighbour count per box (detector windows merged into it).
    scores: list[float] = field(default_factory=list)
    # Area of the largest box over the image area (0 when no face).
    largest_share: float = 0.0

    @property
    def count(self) -> int:
        return len(self.boxes)


@functools.lru_cache(maxsize=4)
def _cascade(name: str):
    import cv2

    path = cv2.data.haarcascades + name
    clf = cv2.CascadeClassifier(path)
    if clf.empty():
        raise ValueError(f"cannot load face cascade {name!r} from {cv2.data.haarcascades}")
    return clf


def _grey(img: np.ndarray) -> np.ndarray:
    import cv2

    a = np.asarray(img)
    if a.dtype != np.uint8 or a.ndim not in (2, 3) or (a.ndim == 3 and a.shape[2] not in (3, 4)):
        raise ValueError(f"expected an HxW or HxWx3 uint8 image, got {a.dtype} {a.shape}")
    if a.ndim == 2:
        return a
    return cv2.cvtColor(np.ascontiguousarray(a[..., :3]), cv2.COLOR_RGB2GRAY)


def nms(boxes: np.ndarray, scores: np.ndarray, iou: float, contain: float) -> np.ndarray:
    """Indices kept by greedy non-maximum suppression (highest score first) over (x, y, w, h) boxes.

    A box is dropped when its intersection over union with a kept box exceeds `iou`, or when at
    least `contain` of its own area lies inside a kept box.
    """
    b = np.asarray(boxes, dtype=np.float64).reshape(-1, 4)
    if len(b) == 0:
        return np.zeros(0, dtype=np.int64)
    x0, y0 = b[:, 0], b[:, 1]
    x1, y1 = x0 + b[:, 2], y0 + b[:, 3]
    area = np.maximum(b[:, 2], 0) * np.maximum(b[:, 3], 0)
    order = np.lexsort((-area, -np.asarray(scores, dtype=np.float64)))  # score, then bigger box
    keep: list[int] = []
    alive = np.ones(len(b), dtype=bool)
    for i in order:
        if not alive[i]:
            continue
        keep.append(int(i))
        iw = np.clip(np.minimum(x1, x1[i]) - np.maximum(x0, x0[i]), 0, None)
        ih = np.clip(np.minimum(y1, y1[i]) - np.maximum(y0, y0[i]), 0, None)
        inter = iw * ih
        union = area + area[i] - inter
        over = (inter > iou * np.maximum(union, 1e-12)) | (inter >= contain * np.maximum(area, 1e-12))
        alive &= ~over
    return np.asarray(keep, dtype=np.int64)


def detect_faces(rgb: np.ndarray, cfg: FacesConfig | None = None) -> FaceResult:
    """Frontal faces in an upright RGB (or grey) uint8 image; boxes in the image's own pixels."""
    import cv2

    cfg = cfg or FacesConfig()
    grey = _grey(rgb)
    h, w = grey.shape
    if h == 0 or w == 0:
        return FaceResult()
    scale = min(1.0, cfg.work_long_side / max(h, w))
    work = grey
    if scale < 1.0:
        work = cv2.resize(grey, (max(1, round(w * scale)), max(1, round(h * scale))), interpolation=cv2.INTER_AREA)
    if cfg.equalize:
        work = cv2.equalizeHist(work)
    min_side = max(20, int(round(cfg.min_face_share * min(work.shape))))
    if min(work.shape) < min_side:
        return FaceResult()
    found, neighbours = _cascade(cfg.cascade).detectMultiScale2(
        work, scaleFactor=cfg.scale_factor, minNeighbors=cfg.min_neighbors, minSize=(min_side, min_side))
    if len(found) == 0:
        return FaceResult()
    boxes = np.asarray(found, dtype=np.float64).reshape(-1, 4)
    scores = np.asarray(neighbours, dtype=np.float64).reshape(-1)
    keep = nms(boxes, scores, cfg.nms_iou, cfg.nms_contain)
    out: list[tuple[int, int, int, int]] = []
    for bx, by, bw, bh in boxes[keep] / scale:
        x0, y0 = max(0, int(round(bx))), max(0, int(round(by)))
        x1, y1 = min(w, int(round(bx + bw))), min(h, int(round(by + bh)))
        out.append((x0, y0, x1 - x0, y1 - y0))
    largest = max(bw * bh for _, _, bw, bh in out) / float(h * w)
    return FaceResult(boxes=out, scores=[float(s) for s in scores[keep]], largest_share=float(largest))


def widen(box: tuple[int, int, int, int], margin: float, shape: tuple[int, ...]) -> tuple[int, int, int, int]:
    """(x0, y0, x1, y1) of a box widened by `margin` of its width/height per side, clipped to the image."""
    x, y, bw, bh = box
    mx, my = margin * bw, margin * bh
    x0, y0 = max(0, int(np.floor(x - mx))), max(0, int(np.floor(y - my)))
    x1, y1 = min(shape[1], int(np.ceil(x + bw + mx))), min(shape[0], int(np.ceil(y + bh + my)))
    return x0, y0, x1, y1


def blur_faces(rgb: np.ndarray, boxes, margin: float = 0.2, sigma_share: float = 0.12) -> np.ndarray:
    """A copy of the image with a Gaussian blur over each box widened by `margin`; pixels outside stay.

    Blurring faces cost under one point of ImageNet top-1 accuracy on average in Yang et al.,
    "A Study of Face Obfuscation in ImageNet", ICML 2022, so blurred images remain useful for training.
    """
    import cv2

    img = np.asarray(rgb)
    if img.dtype != np.uint8 or img.ndim not in (2, 3):
        raise ValueError(f"expected an HxW or HxWxC uint8 image, got {img.dtype} {img.shape}")
    out = img.copy()
    for box in boxes:
        x0, y0, x1, y1 = widen(tuple(box), margin, img.shape)
        if x1 <= x0 or y1 <= y0:
            continue
        sigma = max(1.0, sigma_share * max(x1 - x0, y1 - y0))
        pad = int(np.ceil(3 * sigma))  # blur with the surrounding pixels as support, write inside only
        px0, py0 = max(0, x0 - pad), max(0, y0 - pad)
        px1, py1 = min(img.shape[1], x1 + pad), min(img.shape[0], y1 + pad)
        region = np.ascontiguousarray(out[py0:py1, px0:px1])
        blurred = cv2.GaussianBlur(region, (0, 0), sigmaX=sigma, sigmaY=sigma, borderType=cv2.BORDER_REFLECT)
        out[y0:y1, x0:x1] = blurred[y0 - py0:y1 - py0, x0 - px0:x1 - px0]
    return out


def face_check(result: FaceResult, cfg: FacesConfig | None = None) -> dict:
    """The check record of the `face` flag: passes when no face was found."""
    cfg = cfg or FacesConfig()
    if result.count:
        detail = (f"{result.count} face(s), largest {result.largest_share:.1%} of the image, "
                  f"best score {max(result.scores):g} (windows merged; min {cfg.min_neighbors})")
    else:
        detail = "no frontal face found (screening aid: small, turned or occluded faces are missed)"
    return check(CODE, value=result.count, threshold=0, op="==", unit="faces", detail=detail)
