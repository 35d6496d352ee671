"""Write the Kilnworks demo corpus: rendered product photos, caption sidecars, planted faults.

Deterministic: fixed seeds, fixed encoder settings, no timestamps, so every run
writes the same bytes. With --expected it also writes expected.csv, one row per
sample, saying what the pipeline should do with it. All data is invented for the demo.

    python sample_corpus/make_corpus.py --out sample_corpus/images
    python sample_corpus/make_corpus.py --expected sample_corpus/expected.csv   # after a change
"""

from __future__ import annotations

import argparse
import csv
import io
import json
import random
import shutil
import sys
import warnings
from dataclasses import dataclass
from pathlib import Path

from PIL import Image, ImageDraw, ImageFilter, ImageFont, ImageOps

sys.path.insert(0, str(Path(__file__).resolve().parent))
from curate import similarity  # noqa: E402

import workshop  # noqa: E402

HERE = Path(__file__).resolve().parent
MARKER = ".kilnworks-corpus"  # lets a re-run clear a folder this script made, and nothing else
SEED = 2011

# Sizes of ordinary samples: short side 384-640, aspect at most 5:3.
GOOD_SIZES = ((512, 512), (640, 480), (480, 640), (600, 400), (400, 600), (640, 427),
              (427, 640), (384, 512), (512, 384), (576, 432), (448, 448), (640, 640))
# Near-duplicate originals are larger than every copy made of them.
ORIGINAL_SIZES = ((800, 600), (600, 800), (768, 576), (720, 720), (800, 640), (640, 800))

CSV_FIELDS = ("source", "expect", "reason", "group", "width", "height", "note")

# Distinct scenes are re-drawn until their perceptual codes (multi-view pHash of the crops, no
# transformed views or check codes: DRAW_CODES, closest views) are at least this many bits from
# every scene drawn before, so no two unrelated samples look like near-duplicates. The draw and
# check_hashes keep these settings whatever the pipeline's defaults, so the demo's bytes never
# change with them. Neither guards the pipeline's transformed (mirror) views: drawn under them
# (SEED 2011, mirror of every crop and of the whole picture only), the check still found two
# unrelated samples 10 bits apart.
# Common practice: up to about 10 bits marks a likely variant (see shared FACTS); the default
# neardup radius is 8.
MIN_DISTINCT_BITS = 13
# After the build, no two samples outside one duplicate group may be this close.
MAX_VARIANT_BITS = 10
# Every planted near-duplicate stays within this many bits of its original (the neardup radius).
CLOSE_VARIANT_BITS = 8


DRAW_CODES = similarity.CodeSettings(transforms=[], check="")


@dataclass
class Sample:
    path: str  # relative, '/' separators, with extension
    data: bytes
    sidecar: tuple[str, bytes] | None  # (extension, bytes) or None for no sidecar
    expect: str  # kept | dropped | flagged | quarantined | kept_one
    reason: str = ""
    group: str = ""
    size: tuple[int, int] | None = None  # displayed width, height; None if it does not decode
    note: str = ""


# ------------------------------------------------------------------ encoders


def jpeg(img: Image.Image, quality: int = 88, **kw) -> bytes:
    buf = io.BytesIO()
    img.save(buf, "JPEG", quality=quality, optimize=False, progressive=False, **kw)
    return buf.getvalue()


def png(img: Image.Image, **kw) -> bytes:
    buf = io.BytesIO()
    img.save(buf, "PNG", compress_level=6, **kw)  # Pillow writes no tIME chunk
    return buf.getvalue()


def encode(img: Image.Image, fmt: str, **kw) -> bytes:
    buf = io.BytesIO()
    img.save(buf, fmt, **kw)
    return buf.getvalue()


def txt(caption: str) -> tuple[str, bytes]:
    return (".txt", caption.encode("utf-8"))


def meta_json(caption: str, sku: str) -> tuple[str, bytes]:
    body = json.dumps({"caption": caption, "sku": sku, "shoot": "studio"}, sort_keys=True,
                      ensure_ascii=False)
    return (".json", body.encode("utf-8"))


def luhn_ok(number: str) -> bool:
    """Luhn check (ISO/IEC 7812-1 annex B), used to assert the planted card number is valid."""
    digits = [int(c) for c in number if c.isdigit()]
    total = 0
    for i, d in enumerate(reversed(digits)):
        if i % 2 == 1:
            d = d * 2 - 9 if d > 4 else d * 2
        total += d
    return total % 10 == 0


def iban_ok(iban: str) -> bool:
    """ISO 13616 check: MOD 97-10 (ISO/IEC 7064) of the rearranged IBAN equals 1."""
    s = iban.replace(" ", "")
    s = s[4:] + s[:4]
    return int("".join(str(int(c, 36)) for c in s)) % 97 == 1


# ------------------------------------------------------------------ the corpus


class Corpus:
    def __init__(self) -> None:
        self.samples: list[Sample] = []
        self.rng = random.Random(SEED)
        self.counter = 0
        self.seen_captions: set[str] = set()
        self.scene_hashes: list = []

    # -- helpers
    def next_name(self, folder: str, ext: str = ".jpg") -> str:
        self.counter += 1
        year = {"2024": "24", "2025": "25"}.get(folder.split("/")[0], "ar")
        return f"{folder}/kw{year}-{self.counter:04d}{ext}"

    def scene(self, size=None, post=None) -> tuple[dict, Image.Image, random.Random]:
        """A new scene whose pHash is far from every scene drawn before (after `post(img, r)`, if given)."""
        for _ in range(100):
            r = random.Random(self.rng.getrandbits(64))
            spec = workshop.random_spec(r)
            img = workshop.render(spec, size or r.choice(GOOD_SIZES), r)
            if post is not None:
                img = post(img, r)
            h = codes(img)
            if all(min_distance(h, other) >= MIN_DISTINCT_BITS for other in self.scene_hashes):
                self.scene_hashes.append(h)
                return spec, img, r
        raise RuntimeError("could not draw a scene distinct from the others")

    def caption(self, spec: dict, r: random.Random) -> str:
        """A fresh good caption, never the same text as another sample's."""
        for _ in range(50):
            text = workshop.describe(spec, r)
            if text not in self.seen_captions:
                self.seen_captions.add(text)
                return text
        raise RuntimeError("could not draw a unique caption")

    def sidecar(self, caption: str, r: random.Random) -> tuple[str, bytes]:
        if r.random() < 0.15:
            return meta_json(caption, f"KW-{r.randrange(10000):04d}")
        return txt(caption)

    def add(self, **kw) -> Sample:
        s = Sample(**kw)
        self.samples.append(s)
        return s

    # -- ordinary samples
    def good(self, folder: str, n: int, exts=(".jpg",)) -> None:
        for i in range(n):
            spec, img, r = self.scene()
            ext = exts[i % len(exts)]
            q = r.choice((84, 86, 88, 90, 92))
            self.add(path=self.next_name(folder, ext), data=jpeg(img, q),
                     sidecar=self.sidecar(self.caption(spec, r), r), expect="kept", size=img.size)

    def mismatched(self, folder: str, n: int) -> None:
        for _ in range(n):
            spec, img, r = self.scene()
            wrong = workshop.mismatch(spec, r)
            cap = self.caption(wrong, r)
            self.add(path=self.next_name(folder), data=jpeg(img, 88), sidecar=self.sidecar(cap, r),
                     expect="dropped", reason="agreement_low", size=img.size,
                     note=f"shows a {spec['glaze']} {spec['item']}; caption names a "
                          f"{wrong['glaze']} {wrong['item']}")

    # -- duplicates
    def exact_duplicates(self) -> None:
        layout = (("2024", "archive"), ("2025", "2025"), ("2024", "2025", "archive"))
        for k, folders in enumerate(layout, start=1):
            spec, img, r = self.scene()
            data = jpeg(img, 90)
            group = f"exact{k}"
            for j, folder in enumerate(folders):
                name = self.next_name(folder)
                if j:
                    name = name.replace(".jpg", "-copy.jpg")
                self.add(path=name, data=data, sidecar=txt(self.caption(spec, r)), expect="kept_one",
                         reason="duplicate", group=group, size=img.size,
                         note=f"byte-identical copy {j + 1} of {len(folders)}; exactly one kept")

    def near_duplicates(self) -> None:
        # Each original gets some of these variants; every kind is used at least twice.
        plans = (("requality", "resize"), ("crop", "watermark"), ("brightness", "png"),
                 ("resize", "crop", "requality"), ("watermark", "brightness"), ("png", "crop"))
        for k, kinds in enumerate(plans, start=1):
            size = ORIGINAL_SIZES[k - 1]
            spec, img, r = self.scene(size)
            group = f"near{k}"
            folder = ("2024", "2025")[k % 2]
            self.add(path=self.next_name(folder), data=jpeg(img, 92),
                     sidecar=txt(self.caption(spec, r)), expect="kept", group=group,
                     size=img.size, note="original, the largest copy of its group")
            original = decoded_hash(self.samples[-1].data)
            for kind in kinds:
                for _ in range(20):  # a crop can move the hash a lot: keep one that stays close
                    variant, data, ext, note = self.variant(img, kind, r)
                    if min_distance(decoded_hash(data), original) <= CLOSE_VARIANT_BITS:
                        break
                else:
                    raise RuntimeError(f"no {kind} variant within {CLOSE_VARIANT_BITS} bits")
                out_folder = "archive" if kind in ("requality", "png") else folder
                self.add(path=self.next_name(out_folder, ext), data=data,
                         sidecar=txt(self.caption(spec, r)), expect="dropped", reason="duplicate",
                         group=group, size=variant.size, note=note)

    def variant(self, img: Image.Image, kind: str, r: random.Random):
        w, h = img.size
        if kind == "requality":
            v = img.resize((int(w * 0.85), int(h * 0.85)), Image.Resampling.LANCZOS)
            return v, jpeg(v, 18), ".jpg", "re-encoded at JPEG quality 18, 85% size"
        if kind == "resize":
            v = img.resize((int(w * 0.6), int(h * 0.6)), Image.Resampling.BICUBIC)
            return v, jpeg(v, 88), ".jpg", "resized to 60%"
        if kind == "crop":
            f = [r.uniform(0.0, 0.03) for _ in range(4)]
            box = (int(w * f[0]), int(h * f[1]), w - int(w * f[2]), h - int(h * f[3]))
            v = img.crop(box)
            pct = "/".join(f"{x * 100:.0f}" for x in f)
            return v, jpeg(v, 88), ".jpg", f"cropped {pct}% (left/top/right/bottom)"
        if kind == "watermark":
            v = img.resize((int(w * 0.92), int(h * 0.92)), Image.Resampling.LANCZOS)
            stamp(v)
            return v, jpeg(v, 88), ".jpg", "92% size with a corner watermark stamp"
        if kind == "brightness":
            v = img.resize((int(w * 0.9), int(h * 0.9)), Image.Resampling.LANCZOS)
            v = v.point(lambda p: min(255, int(p * 1.18 + 6)))
            return v, jpeg(v, 88), ".jpg", "90% size, brightened by about 20%"
        if kind == "png":
            v = img.resize((int(w * 0.8), int(h * 0.8)), Image.Resampling.LANCZOS)
            v = Image.open(io.BytesIO(jpeg(v, 85))).convert("RGB")  # a PNG made from a JPEG
            return v, png(v), ".png", "PNG copy of a JPEG, 80% size"
        raise ValueError(kind)

    # -- image faults
    def image_faults(self) -> None:
        def plain(size):
            spec, img, r = self.scene(size)
            return img, txt(self.caption(spec, r))

        for size, reason in (((64, 64), "pixels_small"), ((48, 32), "pixels_small"),
                             ((120, 90), "short_side_small"), ((200, 150), "short_side_small"),
                             ((160, 240), "short_side_small")):
            img, cap = plain(size)
            self.add(path=self.next_name("archive"), data=jpeg(img, 90), sidecar=cap,
                     expect="dropped", reason=reason, size=size,
                     note=f"{size[0]}x{size[1]}: fails both the short-side and the pixel-count check")
        for size in ((2400, 400), (400, 2200), (2000, 400), (1600, 200)):
            img, cap = plain(size)
            note = f"{size[0]}x{size[1]} banner, aspect {max(size) / min(size):.1f}"
            if min(size) < 256:
                note += "; short side also small"
            self.add(path=self.next_name("archive"), data=jpeg(img, 88), sidecar=cap,
                     expect="dropped", reason="aspect_extreme", size=size, note=note)
        for size, q in (((448, 448), 10), ((400, 400), 12), ((384, 480), 15)):
            spec, img, r = self.scene(size)
            data = encode(img.filter(ImageFilter.GaussianBlur(8)), "JPEG", quality=q, optimize=True)
            self.add(path=self.next_name("2025"), data=data, sidecar=txt(self.caption(spec, r)),
                     expect="dropped", reason="file_small", size=size,
                     note=f"{len(data)} bytes: heavily blurred, JPEG quality {q}, optimised tables")
        plans = ("line drawing of a kiln shelf layout for a stoneware firing",
                 "scanned floor plan of the Kilnworks studio, throwing room and glaze kitchen")
        for size, caption in zip(((12000, 9000), (16000, 16000)), plans):
            big = Image.new("1", size, 1)
            d = ImageDraw.Draw(big)
            d.rectangle((size[0] // 4, size[1] // 4, 3 * size[0] // 4, 3 * size[1] // 4), outline=0,
                        width=40)
            d.ellipse((size[0] // 3, size[1] // 3, 2 * size[0] // 3, 2 * size[1] // 3), outline=0,
                      width=40)
            self.add(path=self.next_name("archive", ".png"), data=png(big),
                     sidecar=txt(caption),
                     expect="dropped", reason="too_many_pixels", size=size,
                     note=f"{size[0]}x{size[1]} = {size[0] * size[1] / 1e6:.0f} MP bilevel PNG "
                          "(Pillow's bomb limit is 89.5 MP)")

    def broken_files(self) -> None:
        r = random.Random(SEED + 1)
        for n in (2048, 9000):
            self.add(path=self.next_name("archive"), data=bytes(r.getrandbits(8) for _ in range(n)),
                     sidecar=txt(self.caption(*self._spec_r())), expect="dropped", reason="not_image",
                     note=f"{n} random bytes named .jpg")
        for text in ("Kilnworks price list 2023\nmug 18.00\nbowl 24.00\n",
                     "TODO: reshoot the teapot series before the spring catalogue\n"):
            self.add(path=self.next_name("archive", ".png"), data=text.encode("utf-8"),
                     sidecar=txt(self.caption(*self._spec_r())), expect="dropped", reason="not_image",
                     note="a text file named .png")
        for folder in ("2024", "archive"):
            self.add(path=self.next_name(folder), data=b"", sidecar=txt(self.caption(*self._spec_r())),
                     expect="dropped", reason="file_empty", note="zero-byte file")
        for cut in (0.5, 0.5, 0.7):
            spec, img, rr = self.scene()
            data = jpeg(img, 88)
            self.add(path=self.next_name("2025"), data=data[: int(len(data) * cut)],
                     sidecar=txt(self.caption(spec, rr)), expect="dropped", reason="truncated",
                     note=f"valid JPEG cut to {cut:.0%} of its bytes; the header still reads")
        for _ in range(2):
            spec, img, rr = self.scene()
            data = jpeg(img, 88)
            sos = data.find(b"\xff\xda")
            junk = bytes(r.getrandbits(8) for _ in range(len(data) - sos - 202))
            self.add(path=self.next_name("2024"), data=data[: sos + 200] + junk + b"\xff\xd9",
                     sidecar=txt(self.caption(spec, rr)), expect="dropped", reason="decode_error",
                     note="valid JPEG header, random entropy-coded data "
                          "(Pillow: 'broken data stream')")

    def _spec_r(self):
        r = random.Random(self.rng.getrandbits(64))
        return workshop.random_spec(r), r

    # -- caption faults (all on good images)
    def caption_faults(self) -> None:
        def img_sample(folder, sidecar, expect, reason, note="", ext=".jpg"):
            spec, img, r = self.scene()
            return self.add(path=self.next_name(folder, ext), data=jpeg(img, 88), sidecar=sidecar,
                            expect=expect, reason=reason, size=img.size, note=note)

        for folder in ("2024", "2025", "archive"):
            img_sample(folder, None, "dropped", "caption_missing", "no sidecar file")
        img_sample("2025", (".json", b'{"sku": "KW-0417", "shoot": "studio"}'), "dropped",
                   "caption_missing", "JSON sidecar without a caption field")
        for body in (b"", b"   \n", b"\n\t\n"):
            img_sample("2024", (".txt", body), "dropped", "caption_empty",
                       f"sidecar holds {body!r}")
        for body in ("IMG_4032.JPG", "DSC00123", "DSCF7781.JPG", "PXL_20240316_141502123.jpg"):
            img_sample("archive", txt(body), "dropped", "caption_filename", "camera file name")
        for body in ("image", "untitled", "photo", "Untitled"):
            img_sample("archive", txt(body), "dropped", "caption_boilerplate", "boilerplate word")
        for body in ("mug", "vase"):
            img_sample("2025", txt(body), "dropped", "caption_short", f"{len(body)} characters")
        for body in ("blue teapot", "glazed jug"):
            img_sample("2025", txt(body), "dropped", "caption_few_tokens", "two words")
        for k in range(2):
            spec, img, r = self.scene()
            text = long_description(spec, r)
            self.add(path=self.next_name("2024"), data=jpeg(img, 88), sidecar=txt(text),
                     expect="dropped", reason="caption_long", size=img.size,
                     note=f"{len(text)} characters, a whole product page")
        for k in range(2):
            spec, img, r = self.scene()
            text = tag_soup(spec, r)
            self.add(path=self.next_name("2025"), data=jpeg(img, 88), sidecar=txt(text),
                     expect="flagged", reason="caption_many_tokens", size=img.size,
                     note=f"{len(text.split())} comma-separated tags, {len(text)} characters")
        spec, img, r = self.scene()
        text = workshop.describe(spec, r) + ", crème-coloured naïve style"
        self.add(path=self.next_name("archive"), data=jpeg(img, 88), sidecar=(".txt", text.encode("latin-1")),
                 expect="kept", reason="", size=img.size,
                 note="Latin-1 bytes, not UTF-8: repaired by the caption stage")
        spec, img, r = self.scene()
        text = workshop.describe(spec, r).encode("utf-8") + b" \xc3\x28 studio shot"
        self.add(path=self.next_name("archive"), data=jpeg(img, 88), sidecar=(".txt", text),
                 expect="kept", reason="", size=img.size,
                 note="invalid UTF-8 sequence C3 28: repaired by the caption stage")
        img_sample("2025", (".json", b'{"caption": "green vase on linen", "sku": '), "dropped",
                   "caption_unreadable", "JSON sidecar cut short (invalid JSON)")
        for k in range(2):
            spec, img, r = self.scene()
            clean = self.caption(spec, r) + " \u2013 caf\u00e9 collection"
            broken = clean.encode("utf-8").decode("cp1252", errors="replace")
            self.add(path=self.next_name("2025"), data=jpeg(img, 88), sidecar=txt(broken),
                     expect="kept", size=img.size,
                     note="mojibake (UTF-8 read as cp1252); repairable, so kept")
        spam = "Kilnworks - handmade ceramics since 2011. Free shipping on orders over 50!"
        for k in range(8):
            img_sample(("2024", "2025")[k % 2], txt(spam), "dropped", "caption_repeated",
                       "one shop template caption on 8 different images")

    # -- personal data in captions (flagged, kept)
    def personal_data(self) -> None:
        cases = (
            ("pii:email", "commissions welcome: jane.potter@kilnworks.example"),
            ("pii:email", "questions to studio@kilnworks.example"),
            ("pii:phone", "call the studio on +44 20 7946 0958"),
            ("pii:phone", "orders by phone +1 202 555 0147"),
            ("pii:card", "paid with card 4111 1111 1111 1111"),
            ("pii:card", "card no 4111111111111111 charged"),
            ("pii:iban", "bank transfer to GB82 WEST 1234 5698 7654 32"),
            ("pii:iban", "IBAN DE89 3704 0044 0532 0130 00"),
            ("pii:url", "shop it at https://kilnworks.example/shop/item-12"),
        )
        for code, extra in cases:
            if code == "pii:card":
                assert luhn_ok(extra), extra
            if code == "pii:iban":
                assert iban_ok(extra.split("to ")[-1].replace("IBAN ", "")), extra
            spec, img, r = self.scene()
            cap = self.caption(spec, r) + ", " + extra
            self.add(path=self.next_name("2025"), data=jpeg(img, 88), sidecar=txt(cap),
                     expect="flagged", reason=code, size=img.size, note="personal data in caption")

    # -- the shop watermark (a concept probe's flag; quarantined, kept out of train and eval)
    def watermarked(self, folders: tuple[str, ...]) -> None:
        for folder in folders:
            spec, img, r = self.scene(post=workshop.watermark)
            self.add(path=self.next_name(folder), data=jpeg(img, r.choice((84, 86, 88, 90, 92))),
                     sidecar=self.sidecar(self.caption(spec, r), r), expect="quarantined",
                     reason="watermark", size=img.size,
                     note="the shop watermark stamped across the photo; the caption does not mention it")

    # -- a person in the shot (the faces stage's flag; kept, flagged for review)
    def staff_photos(self) -> None:
        """Two scenes with a portrait pasted beside the pot, as if the potter stood in the shot.

        The portrait is NASA's public-domain photo of astronaut Eileen Collins, shipped with
        scikit-image as `skimage.data.astronaut()`: the only real person in the demo."""
        from skimage import data

        face = Image.fromarray(data.astronaut()).crop((120, 0, 360, 240))  # head and shoulders

        def paste(side):
            def post(img, r):
                w, h = img.size
                size = int(min(w, h) * 0.42)
                x = 8 if side == "left" else w - size - 8
                img = img.copy()
                img.paste(face.resize((size, size), Image.Resampling.LANCZOS), (x, 8))
                return img
            return post

        for folder, side in (("2024", "left"), ("2025", "right")):
            spec, img, r = self.scene((640, 480), post=paste(side))
            self.add(path=self.next_name(folder), data=jpeg(img, 90), sidecar=txt(self.caption(spec, r)),
                     expect="flagged", reason="face", size=img.size,
                     note="a public-domain portrait (skimage.data.astronaut) pasted into the top corner")

    # -- valid files in less common forms
    def formats(self) -> None:
        for k in range(2):
            spec, img, r = self.scene((640, 480))
            exif = Image.Exif()
            exif[0x0112] = 6  # orientation: rotate 90 degrees clockwise to display
            stored = img.transpose(Image.Transpose.ROTATE_90)  # counter-clockwise, undone on display
            self.add(path=self.next_name("2024"), data=jpeg(stored, 88, exif=exif.tobytes()),
                     sidecar=txt(self.caption(spec, r)), expect="kept", size=(640, 480),
                     note="EXIF orientation 6: stored 480x640, displayed 640x480")
        for lat, lon, place in (((53, 0, 9.7), (2, 10, 45.8), "Stoke-on-Trent"),
                                ((50, 9, 2.0), (5, 4, 12.0), "Cornwall")):
            spec, img, r = self.scene()
            exif = Image.Exif()
            exif[0x8825] = {1: "N", 2: lat, 3: "W", 4: lon}
            self.add(path=self.next_name("2025"), data=jpeg(img, 88, exif=exif.tobytes()),
                     sidecar=txt(self.caption(spec, r)), expect="flagged", reason="location",
                     size=img.size, note=f"EXIF GPS tags ({place})")

        def add_fmt(folder, ext, data, size, note):
            spec, r = self._last
            self.add(path=self.next_name(folder, ext), data=data, sidecar=txt(self.caption(spec, r)),
                     expect="kept", size=size, note=note)

        spec, img, r = self.scene((512, 512))
        self._last = (spec, r)
        rgba = img.convert("RGBA")
        alpha = Image.new("L", img.size, 0)
        ImageDraw.Draw(alpha).rounded_rectangle((0, 0, 511, 511), radius=60, fill=255)
        rgba.putalpha(alpha)
        add_fmt("2025", ".png", png(rgba), img.size, "RGBA PNG with transparent corners")

        spec, img, r = self.scene((480, 480))
        self._last = (spec, r)
        add_fmt("archive", ".gif", encode(img.quantize(256, dither=Image.Dither.NONE), "GIF"),
                img.size, "palette GIF, 256 colours")

        spec, img, r = self.scene((448, 448))
        self._last = (spec, r)
        frames = [img.quantize(128)]
        for shift in (6, 12):
            moved = Image.new("RGB", img.size)
            moved.paste(img, (shift, 0))
            moved.paste(img.crop((0, 0, shift, img.height)), (0, 0))
            frames.append(moved.quantize(128))
        add_fmt("archive", ".gif", encode(frames[0], "GIF", save_all=True, append_images=frames[1:],
                                          duration=200, loop=0), img.size, "animated GIF, 3 frames")

        spec, img, r = self.scene((512, 384))
        grey = img.convert("L")
        deep = Image.frombytes("I;16", grey.size,
                               bytes(b for p in grey.tobytes() for b in (p, p)))  # 16-bit, v*257
        cap = f"monochrome archive photo of a {spec['item']} on {workshop.BACKDROPS[0]}" \
            if spec["backdrop"] == workshop.BACKDROPS[0] else \
            f"black and white archive photo of a handmade {spec['item']}, {spec['pattern']} glaze"
        self.add(path=self.next_name("archive", ".png"), data=png(deep), sidecar=txt(cap),
                 expect="kept", size=img.size, note="16-bit greyscale PNG")

        spec, img, r = self.scene((512, 512))
        self._last = (spec, r)
        add_fmt("2025", ".jpg", jpeg(img.convert("CMYK"), 90), img.size, "CMYK JPEG")
        for k in range(2):
            spec, img, r = self.scene()
            self._last = (spec, r)
            add_fmt("2025", ".webp", encode(img, "WEBP", quality=82, method=4), img.size, "WebP")
        spec, img, r = self.scene((448, 448))
        self._last = (spec, r)
        add_fmt("archive", ".bmp", encode(img, "BMP"), img.size, "24-bit BMP")
        spec, img, r = self.scene((512, 384))
        self._last = (spec, r)
        add_fmt("archive", ".tif", encode(img, "TIFF", compression="tiff_lzw"), img.size,
                "LZW-compressed TIFF")
        for ext in (".JPG", ".jpeg", ".TIFF"):
            spec, img, r = self.scene()
            self._last = (spec, r)
            data = encode(img, "TIFF", compression="tiff_lzw") if "TIF" in ext else jpeg(img, 88)
            add_fmt("2024", ext, data, img.size, f"extension spelled {ext}")


def stamp(img: Image.Image) -> None:
    """A small corner watermark: a translucent box with the shop name."""
    w, h = img.size
    layer = Image.new("RGBA", img.size, (0, 0, 0, 0))
    d = ImageDraw.Draw(layer)
    box = (w - int(w * 0.24), h - int(h * 0.06), w - 8, h - 8)
    d.rectangle(box, fill=(255, 255, 255, 110))
    d.text((box[0] + 6, box[1] + 4), "(c) KILNWORKS", fill=(40, 40, 40, 200),
           font=ImageFont.load_default())
    img.paste(Image.alpha_composite(img.convert("RGBA"), layer).convert("RGB"))


def long_description(spec: dict, r: random.Random) -> str:
    sentences = [
        f"This {spec['glaze']} {spec['item']} was thrown on the wheel in our studio and trimmed by hand.",
        f"The {spec['pattern']} glaze is applied in two coats and fired to cone 6 in an electric kiln.",
        "Every piece is slightly different, so the one you receive may vary a little from the photo.",
        "The clay is a mid-fire stoneware body with a fine grog that gives a warm, toasty foot ring.",
        "Dishwasher and microwave safe, though hand washing will keep the glaze bright for longer.",
        f"Photographed on {workshop._BACKDROP_PHRASES[spec['backdrop']][0]} under soft studio light.",
        "We pack every order in recycled paper and ship within five working days of purchase.",
        "Pairs well with the rest of the range, which includes matching cups, plates and serving bowls.",
        "Please allow for small pinholes, glaze drips and iron spots, which are part of the character.",
        "If anything arrives damaged, send us a message within a week and we will make it right.",
        "Sizes are approximate, measured by hand after firing, when the clay has shrunk by about 12%.",
        "Thank you for supporting a small workshop; each sale keeps the kiln warm through winter.",
        "Care: avoid sudden temperature changes, such as moving the piece from fridge to hot oven.",
    ]
    return " ".join(sentences)


def tag_soup(spec: dict, r: random.Random) -> str:
    words = ["ceramic", "pottery", "handmade", "stoneware", "glaze", "kiln", "studio", "gift",
             "kitchen", "table", "home", "decor", "rustic", "modern", "minimal", "artisan",
             "craft", "clay", "wheel", "thrown", "fired", "earthy", "organic", "cozy", "tea",
             "coffee", "serving", "dinnerware", "tableware", "vintage", "boho", "nordic"]
    tags = [spec["item"], spec["glaze"], spec["pattern"]]
    while len(tags) < 110:
        tags.append(r.choice(words))
    return ", ".join(tags)


def build() -> list[Sample]:
    c = Corpus()
    c.good("2024", 84)
    c.good("2025", 76)
    c.good("archive", 10)
    c.mismatched("2024", 16)
    c.mismatched("2025", 14)
    c.exact_duplicates()
    c.near_duplicates()
    c.image_faults()
    c.broken_files()
    c.caption_faults()
    c.personal_data()
    c.formats()
    c.watermarked(("2024",) * 3 + ("2025",) * 4 + ("archive",) * 3)
    c.staff_photos()
    # Twenty more stamped photos, drawn last so that every sample above keeps its bytes: enough
    # positives to train a probe on some of them (curate probe train needs 10 per class) and
    # measure it on the rest.
    c.watermarked(("2024",) * 7 + ("2025",) * 8 + ("archive",) * 5)
    paths = [s.path.lower().rsplit(".", 1)[0] for s in c.samples]
    if len(set(paths)) != len(paths):
        raise RuntimeError("two samples share a stem")
    check_hashes(c.samples)
    return c.samples


def codes(img: Image.Image):
    """The demo's own perceptual codes of an image (DRAW_CODES)."""
    return similarity.image_codes(img, DRAW_CODES)


def min_distance(a, b) -> int:
    """Closest pair of two samples' DRAW_CODES views."""
    return similarity.min_distance(a, b)


def decoded_hash(data: bytes):
    """pHash of the image as displayed, or None when it does not decode or is huge."""
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", Image.DecompressionBombWarning)
        try:
            with Image.open(io.BytesIO(data)) as im:
                if im.width * im.height > 50_000_000:
                    return None
                return codes(ImageOps.exif_transpose(im).convert("RGB"))
        except Exception:  # broken files are planted on purpose; they have no hash
            return None


def check_hashes(samples: list[Sample]) -> None:
    """Note each duplicate's distance to its original; fail if unrelated samples collide."""
    hashes = [decoded_hash(s.data) for s in samples]
    first: dict[str, int] = {}
    for i, s in enumerate(samples):
        if s.group:
            if s.group in first:
                d = min_distance(hashes[i], hashes[first[s.group]])
                s.note += f" (pHash distance {d} to {samples[first[s.group]].path})"
            else:
                first[s.group] = i
    for i, a in enumerate(samples):
        for j in range(i + 1, len(samples)):
            b = samples[j]
            if hashes[i] is None or hashes[j] is None or (a.group and a.group == b.group):
                continue
            if min_distance(hashes[i], hashes[j]) <= MAX_VARIANT_BITS:
                raise RuntimeError(f"{a.path} and {b.path} are {min_distance(hashes[i], hashes[j])} bits apart "
                                   "but are not planted duplicates; change SEED")


def expected_csv(samples: list[Sample]) -> str:
    """The expected outcomes as CSV text, rows sorted by source."""
    buf = io.StringIO()
    wr = csv.writer(buf, lineterminator="\n")
    wr.writerow(CSV_FIELDS)
    for s in sorted(samples, key=lambda s: s.path):
        wr.writerow((s.path, s.expect, s.reason, s.group,
                     s.size[0] if s.size else "", s.size[1] if s.size else "", s.note))
    return buf.getvalue()


def write(samples: list[Sample], out: Path) -> None:
    if out.exists() and any(out.iterdir()):
        if not (out / MARKER).exists():
            raise SystemExit(f"{out} is not empty and was not made by this script; "
                             "pick an empty or new folder")
        shutil.rmtree(out)
    out.mkdir(parents=True, exist_ok=True)
    (out / MARKER).write_text("made by sample_corpus/make_corpus.py\n", encoding="utf-8")
    for s in samples:
        target = out / s.path
        target.parent.mkdir(parents=True, exist_ok=True)
        target.write_bytes(s.data)
        if s.sidecar is not None:
            ext, body = s.sidecar
            target.with_suffix(ext).write_bytes(body)


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--out", type=Path, default=HERE / "images", help="folder to write the corpus to")
    ap.add_argument("--expected", type=Path, default=None,
                    help="also write the expected outcomes here (the committed copy is "
                         "sample_corpus/expected.csv); without it, only warn if that copy is stale")
    args = ap.parse_args(argv)
    samples = build()
    write(samples, args.out)
    text = expected_csv(samples)
    if args.expected is not None:
        args.expected.write_text(text, encoding="utf-8", newline="")
    else:
        committed = HERE / "expected.csv"
        if not committed.exists() or committed.read_text(encoding="utf-8") != text:
            sys.stderr.write(f"warning: {committed} does not match this corpus; rerun with "
                             f"--expected {committed}\n")
    sys.stdout.write(f"wrote {len(samples)} samples to {args.out}\n")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
