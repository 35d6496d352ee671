"""Perceptual codes: 64-bit hashes of several views of one picture.

A view is one crop box of the picture, corners masked, then one transform of that crop (none,
the mirror image, a quarter turn, ...). A sample's codes are laid out identity views first, then each transform's
views in the order the settings list them, so ``views(settings)[k]`` describes code ``k``.
"""
from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any, NamedTuple, Sequence

import numpy as np

BITS = 64
# Bump when the same settings give different codes (cached codes are keyed by it).
VERSION = "3"

# Transforms of the square work picture, as Pillow's Image.transpose methods (rotations are
# counter-clockwise, Pillow's convention). "mirror" flips left and right; the compound names
# mirror the picture after turning it.
TRANSFORMS: dict[str, str] = {
    "mirror": "FLIP_LEFT_RIGHT",
    "rot90": "ROTATE_90",
    "rot180": "ROTATE_180",
    "rot270": "ROTATE_270",
    "mirror_rot90": "TRANSVERSE",
    "mirror_rot180": "FLIP_TOP_BOTTOM",
    "mirror_rot270": "TRANSPOSE",
}
# The transform that undoes each one: quarter turns undo each other, every reflection and the
# half turn undo themselves (dihedral group of the square).
INVERSE: dict[str, str] = {"identity": "identity", "rot90": "rot270", "rot270": "rot90",
                           **{t: t for t in TRANSFORMS if t not in ("rot90", "rot270")}}


@dataclass
class CodeSettings:
    """What decides a picture's codes."""

    # imagehash function: "phash" (DCT hash: robust to compression and scaling, Zauner 2010) or "dhash".
    kind: str = "phash"
    # Centred crops, as a share of each side (1.0 = whole picture). 0.92/0.84 undo border crops of
    # 4%/8% per side (measured in bench/neardup_quality.py: plain pHash misses 8% crops entirely).
    scales: list[float] = field(default_factory=lambda: [1.0, 0.92, 0.84])
    # Four more crops of this share touching each edge: undo crops taken mostly from one side
    # (measured in bench/neardup_quality.py). 0 = off.
    side_scale: float = 0.92
    # Share of each side masked (set to the picture's mean) in every corner of every crop, so small
    # corner stamps and watermarks do not count (measured in bench/neardup_quality.py). 0 = off.
    corner_mask: float = 0.2
    # Extra views of the transformed picture (names in TRANSFORMS). No perceptual hash survives a
    # flip (Zauner 2010); mirrored copies count as copies for training (common practice).
    transforms: list[str] = field(default_factory=lambda: ["mirror"])
    # Crop boxes hashed for each transform: "all" (the same boxes as the picture itself) or
    # "whole" (the whole picture only; the other side's identity crops still match crops).
    transform_boxes: str = "all"
    # The grey picture is resized to this square before cropping, so every source size and JPEG
    # draft decode hashes on the same grid (common practice; 8x imagehash's 32 px DCT input). 0 = off.
    work_size: int = 256
    # A second code per view, of another hash family ("dhash" or "phash"; "" = none), that a match
    # must also pass on the same pair of views (hamming.CHECK_RADIUS): among the public photos'
    # crops and turns, different pictures' pHash views collide at 6-8 bits, but differ by 18 or
    # more bits in dHash on those views (bench/neardup_quality.py).
    check: str = "dhash"

    def validate(self) -> None:
        """Raise ValueError naming the first bad field."""
        if self.kind not in ("phash", "dhash"):
            raise ValueError(f"kind must be phash or dhash, got {self.kind!r}")
        if not self.scales:
            raise ValueError("scales must list at least one crop share")
        for s in self.scales:
            if not 0.5 <= s <= 1.0:
                raise ValueError(f"scales must be within 0.5..1.0, got {s}")
        if self.side_scale and not 0.5 <= self.side_scale < 1.0:
            raise ValueError(f"side_scale must be 0 (off) or within 0.5..1.0 (exclusive), got {self.side_scale}")
        if not 0.0 <= self.corner_mask < 0.5:
            raise ValueError(f"corner_mask must be within 0..0.5, got {self.corner_mask}")
        bad = [t for t in self.transforms if t not in TRANSFORMS]
        if bad:
            raise ValueError(f"unknown transform {bad[0]!r}; expected some of {', '.join(TRANSFORMS)}")
        if len(set(self.transforms)) != len(self.transforms):
            raise ValueError("transforms must not repeat a name")
        if self.transform_boxes not in ("all", "whole"):
            raise ValueError(f"transform_boxes must be all or whole, got {self.transform_boxes!r}")
        if self.check not in ("", "phash", "dhash") or self.check == self.kind:
            raise ValueError(f"check must be '', phash or dhash and differ from kind, got {self.check!r}")
        if self.work_size < 0 or 0 < self.work_size < 32:
            raise ValueError(f"work_size must be 0 (off) or at least 32, got {self.work_size}")


class View(NamedTuple):
    """One code's view: a crop box of the picture (shares of each side), then a transform of the crop."""

    transform: str
    box: tuple[float, float, float, float]


def crop_boxes(scales: Sequence[float] = (1.0, 0.92, 0.84), side_scale: float = 0.92) -> list[tuple[float, float, float, float]]:
    """Crop boxes (left, top, right, bottom as shares of each side): one centred box per scale,
    then, when side_scale is set, four boxes of that scale touching the left, right, top and bottom
    edge (centred along the other axis), which recover pictures cropped more on one side."""
    out = []
    for sc in scales:
        m = (1.0 - float(sc)) / 2
        out.append((m, m, 1.0 - m, 1.0 - m))
    if side_scale and side_scale < 1.0:
        s_, m = float(side_scale), (1.0 - float(side_scale)) / 2
        out += [(0.0, m, s_, 1.0 - m), (1.0 - s_, m, 1.0, 1.0 - m), (m, 0.0, 1.0 - m, s_), (m, 1.0 - s_, 1.0 - m, 1.0)]
    return out


_WHOLE = (0.0, 0.0, 1.0, 1.0)


def _view_boxes(settings: CodeSettings) -> list[tuple[float, float, float, float]]:
    """The identity boxes; with transform_boxes "whole" the whole picture comes first."""
    boxes = crop_boxes(settings.scales, settings.side_scale)
    if settings.transform_boxes == "whole" and boxes[0] != _WHOLE:
        boxes = [_WHOLE] + [b for b in boxes if b != _WHOLE]
    return boxes


def views(settings: CodeSettings) -> list[View]:
    """Every code's view, in code order: identity views first, then each transform's."""
    boxes = _view_boxes(settings)
    out = [View("identity", b) for b in boxes]
    t_boxes = boxes if settings.transform_boxes == "all" else boxes[:1]
    for t in settings.transforms:
        out += [View(t, b) for b in t_boxes]
    return out


def identity_count(settings: CodeSettings) -> int:
    """How many leading views are views of the untransformed picture."""
    return len(_view_boxes(settings))


def view_count(settings: CodeSettings) -> int:
    """How many views (main codes) a picture has."""
    return len(views(settings))


def code_count(settings: CodeSettings) -> int:
    """How many codes ``image_codes`` makes per picture: one per view, twice with a check code."""
    return view_count(settings) * (2 if settings.check else 1)


def split_codes(codes: Any, settings: CodeSettings) -> tuple[np.ndarray, np.ndarray | None]:
    """(main codes, check codes or None) of ``image_codes`` output, 1-D or one row per picture."""
    c = np.asarray(codes, dtype=np.uint64)
    k = view_count(settings)
    if c.shape[-1] != code_count(settings):
        raise ValueError(f"expected {code_count(settings)} codes per picture, got {c.shape[-1]}")
    return c[..., :k], (c[..., k:] if settings.check else None)


def code_of(h: Any) -> int:
    """imagehash.ImageHash -> int, first bit of its flattened array as the most significant bit."""
    bits = np.asarray(h.hash, dtype=bool).ravel()
    if bits.size != BITS:
        raise ValueError(f"expected a {BITS}-bit hash, got {bits.size} bits")
    return int.from_bytes(np.packbits(bits).tobytes(), "big")


def code_hex(code: int) -> str:
    """The hex string imagehash prints for the same hash."""
    return f"{int(code):016x}"


def mask_corners(arr: np.ndarray, share: float) -> np.ndarray:
    """Set the four corner rectangles (share of each side) to the mean of the rest of the picture."""
    h, w = arr.shape
    mh, mw = int(round(h * share)), int(round(w * share))
    if mh <= 0 or mw <= 0 or 2 * mh >= h or 2 * mw >= w:
        return arr
    out = arr.astype(np.float32)
    total = out.sum()
    corners = [(slice(0, mh), slice(0, mw)), (slice(0, mh), slice(w - mw, w)),
               (slice(h - mh, h), slice(0, mw)), (slice(h - mh, h), slice(w - mw, w))]
    corner_sum = sum(float(out[c].sum()) for c in corners)
    fill = (total - corner_sum) / (h * w - 4 * mh * mw)
    for c in corners:
        out[c] = fill
    return out


def _work_picture(img: Any, work_size: int) -> Any:
    """The grey picture the views are cut from."""
    from PIL import Image

    grey = img if img.mode == "L" else img.convert("L")
    if work_size and work_size > 0 and grey.size != (work_size, work_size):
        grey = grey.resize((work_size, work_size), Image.Resampling.LANCZOS)
    return grey


# Transforms of a thumbnail array (rows = y): the numpy twins of the Pillow methods in TRANSFORMS.
_ARRAY_OPS = {
    "mirror": lambda a: a[:, ::-1],
    "rot90": lambda a: np.rot90(a, 1),
    "rot180": lambda a: np.rot90(a, 2),
    "rot270": lambda a: np.rot90(a, 3),
    "mirror_rot90": lambda a: np.rot90(a, 1)[:, ::-1],
    "mirror_rot180": lambda a: a[::-1, :],
    "mirror_rot270": lambda a: np.rot90(a, 3)[:, ::-1],
}
# imagehash.phash's DCT input side (hash_size 8 x highfreq_factor 4) and hash side.
_PHASH_IN, _PHASH_SIDE = 32, 8


def _crops(grey: Any, boxes: Sequence[tuple[float, float, float, float]], corner_mask: float) -> list[Any]:
    """The crop of each box of a grey picture, corners masked, as Pillow images."""
    from PIL import Image

    w, h = grey.size
    arr = np.asarray(grey) if corner_mask else None
    out = []
    for x0, y0, x1, y1 in boxes:
        px = (int(round(x0 * w)), int(round(y0 * h)), max(int(round(x1 * w)), int(round(x0 * w)) + 1),
              max(int(round(y1 * h)), int(round(y0 * h)) + 1))
        if arr is not None:
            part = mask_corners(arr[px[1] : px[3], px[0] : px[2]], corner_mask)
            out.append(Image.fromarray(np.clip(part + 0.5, 0, 255).astype(np.uint8), "L"))
        else:
            out.append(grey if px == (0, 0, w, h) else grey.crop(px))
    return out


def phash_codes(thumbs: np.ndarray) -> np.ndarray:
    """imagehash.phash of a stack of 32x32 grey thumbnails (n, 32, 32), as uint64 codes: DCT of
    rows and columns, the 8x8 lowest frequencies against their median, first bit most significant."""
    import scipy.fftpack

    dct = scipy.fftpack.dct(scipy.fftpack.dct(thumbs, axis=1), axis=2)
    low = dct[:, :_PHASH_SIDE, :_PHASH_SIDE].reshape(thumbs.shape[0], -1)
    bits = low > np.median(low, axis=1, keepdims=True)
    return np.packbits(bits, axis=1).view(">u8").ravel().astype(np.uint64)


def dhash_codes(thumbs: np.ndarray) -> np.ndarray:
    """imagehash.dhash of each grey thumbnail in a stack: 9x8 resize, each pixel brighter than its
    left neighbour, first bit most significant."""
    from PIL import Image

    small = np.stack([np.asarray(Image.fromarray(np.ascontiguousarray(a)).resize((9, 8), Image.Resampling.LANCZOS))
                      for a in thumbs])
    bits = (small[:, :, 1:] > small[:, :, :-1]).reshape(thumbs.shape[0], -1)
    return np.packbits(bits, axis=1).view(">u8").ravel().astype(np.uint64)


def _view_thumbs(crops: list[Any], transforms: Sequence[str], t_count: int) -> np.ndarray:
    """The 32 px thumbnail of every view: each crop's, then each transform of the first t_count."""
    from PIL import Image

    thumbs = np.stack([np.asarray(c.resize((_PHASH_IN, _PHASH_IN), Image.Resampling.LANCZOS)) for c in crops])
    stack = [thumbs] + [np.stack([_ARRAY_OPS[t](a) for a in thumbs[:t_count]]) for t in transforms]
    return np.ascontiguousarray(np.concatenate(stack))


def _dhash_views(crops: list[Any], transforms: Sequence[str], t_count: int) -> np.ndarray:
    """imagehash.dhash of every crop, then of each transform of the first t_count crops."""
    import imagehash
    from PIL import Image

    out = [code_of(imagehash.dhash(c)) for c in crops]
    for t in transforms:
        out += [code_of(imagehash.dhash(c.transpose(getattr(Image.Transpose, TRANSFORMS[t])))) for c in crops[:t_count]]
    return np.array(out, dtype=np.uint64)


def image_codes(img: Any, settings: CodeSettings | None = None) -> np.ndarray:
    """uint64 codes of one Pillow image: one per view in ``views(settings)`` order, then (with a
    ``check`` family) one check code per view in the same order (see ``split_codes``).

    The picture goes to grey and (``work_size`` > 0) to a square, is cut into crop boxes whose
    corners are masked, and each crop is hashed as imagehash does, then each transform of it.
    With scales=[1.0], side_scale=0, corner_mask=0, transforms=[], check="", work_size=0 the one
    code is imagehash's own hash of the picture.
    """
    s = settings or CodeSettings()
    s.validate()
    grey = _work_picture(img, s.work_size)
    boxes = _view_boxes(s)
    crops = _crops(grey, boxes, s.corner_mask)
    t_count = len(boxes) if s.transform_boxes == "all" else 1
    thumbs = _view_thumbs(crops, s.transforms, t_count) if s.kind == "phash" or s.check else None
    main = phash_codes(thumbs) if s.kind == "phash" else _dhash_views(crops, s.transforms, t_count)
    if not s.check:
        return main
    check = dhash_codes(thumbs) if s.check == "dhash" else phash_codes(thumbs)
    return np.concatenate([main, check])


def matched_transform(view_list: Sequence[View], kept_view: int, member_view: int) -> str:
    """The transform that takes the kept picture to the member, from the two views that matched.

    The kept sample's view t matched the member's picture: the member is t of the kept picture.
    The member's view t matched the kept picture: the member is the inverse of t of it.
    """
    tk = view_list[int(kept_view)].transform
    tm = view_list[int(member_view)].transform
    if tk != "identity":
        return tk
    return INVERSE[tm]


def match_name(view_list: Sequence[View], kept_view: int, member_view: int) -> str:
    """How a member relates to its kept picture, from the two views that matched: the transform
    (``matched_transform``), with "+crop" when the two views are different crop boxes ("crop"
    alone for an untransformed crop); "identity" when the same view of both matched."""
    t = matched_transform(view_list, kept_view, member_view)
    cropped = view_list[int(kept_view)].box != view_list[int(member_view)].box
    if not cropped:
        return t
    return "crop" if t == "identity" else f"{t}+crop"
