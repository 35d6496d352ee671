"""Location metadata in image files: read it, and strip privacy-relevant metadata without re-encoding.

`read_location` reports EXIF GPS coordinates and XMP / IPTC place names.
`strip_metadata` rewrites the container of a JPEG, PNG or WebP file and keeps
only what decoding and colour need, so the compressed pixel data is copied
byte for byte. Everything else goes: EXIF (GPS, camera and lens serial numbers,
owner names, maker notes, thumbnails), XMP, IPTC, comments and text chunks.
Other formats raise UnsupportedFormatError: re-encode those.
"""
from __future__ import annotations

import io
import re
import struct
import warnings
import zlib
from typing import Any

__all__ = [
    "STRIPPABLE_FORMATS",
    "MetadataError",
    "NotUprightError",
    "UnsupportedFormatError",
    "read_location",
    "strip_metadata",
]

STRIPPABLE_FORMATS = ("JPEG", "MPO", "PNG", "WEBP")  # Pillow's format names; MPO is JPEG with extra frames


class MetadataError(ValueError):
    """The bytes cannot be parsed as the format says: re-encode the image instead."""


class UnsupportedFormatError(MetadataError):
    """Metadata is removed without re-encoding only from JPEG, PNG and WebP."""


class NotUprightError(MetadataError):
    """The image is displayed rotated or mirrored by its EXIF Orientation: re-encode it upright."""

    def __init__(self, orientation: int):
        super().__init__(f"EXIF Orientation is {orientation}, not 1: apply it to the pixels and re-encode")
        self.orientation = orientation


# ---------------------------------------------------------------------------------------------
# Reading location metadata

# EXIF 2.3 (CIPA DC-008) tags: the GPS IFD pointer in IFD0, and GPSLatitude / GPSLongitude in it.
_GPS_IFD, _GPS_LATITUDE, _GPS_LONGITUDE = 0x8825, 2, 4
_ORIENTATION = 0x0112  # TIFF 6.0 / EXIF 2.3 Orientation, IFD0

_NS_PHOTOSHOP = "http://ns.adobe.com/photoshop/1.0/"
_NS_IPTC_CORE = "http://iptc.org/std/Iptc4xmpCore/1.0/xmlns/"
_NS_IPTC_EXT = "http://iptc.org/std/Iptc4xmpExt/2008-02-29/"
_NS_EXIF = "http://ns.adobe.com/exif/1.0/"
# XMP place properties (Adobe XMP photoshop schema; IPTC Photo Metadata Standard core and
# extension schemas) with their rank: 0 sub-location, 1 city, 2 state, 3 country.
_XMP_PLACES = {
    f"{{{_NS_IPTC_CORE}}}Location": 0, f"{{{_NS_IPTC_EXT}}}Sublocation": 0,
    f"{{{_NS_IPTC_EXT}}}LocationName": 0,
    f"{{{_NS_PHOTOSHOP}}}City": 1, f"{{{_NS_IPTC_EXT}}}City": 1,
    f"{{{_NS_PHOTOSHOP}}}State": 2, f"{{{_NS_IPTC_EXT}}}ProvinceState": 2,
    f"{{{_NS_PHOTOSHOP}}}Country": 3, f"{{{_NS_IPTC_EXT}}}CountryName": 3,
}
_XMP_GPS = (f"{{{_NS_EXIF}}}GPSLatitude", f"{{{_NS_EXIF}}}GPSLongitude")
# The same properties by their customary prefixes, for packets that are not well-formed XML.
_XMP_PLACE_RX = re.compile(
    rb"(Iptc4xmpCore:Location|Iptc4xmpExt:Sublocation|photoshop:City|Iptc4xmpExt:City|photoshop:State|"
    rb"Iptc4xmpExt:ProvinceState|photoshop:Country|Iptc4xmpExt:CountryName)(?:>|=[\"'])([^<\"']{1,200})"
)
_XMP_GPS_RX = re.compile(rb"exif:GPS(Latitude|Longitude)(?:>|=[\"'])\s*\d")
_RX_RANK = {b"Location": 0, b"Sublocation": 0, b"City": 1, b"State": 2, b"ProvinceState": 2,
            b"Country": 3, b"CountryName": 3}
# IPTC IIM 4.2 application record datasets: 2:92 Sub-location, 2:90 City, 2:95 Province/State,
# 2:101 Country/Primary Location Name, with the same ranks.
_IIM_PLACES = {(2, 92): 0, (2, 90): 1, (2, 95): 2, (2, 101): 3}
_MAX_PLACE = 200


def read_location(img_or_bytes: Any) -> tuple[bool, str | None]:
    """(has GPS coordinates, place names joined most specific first) from EXIF, XMP and IPTC.

    Takes an opened Pillow image or the file's bytes; pixels are never decoded. Broken
    metadata blocks count as absent. In a PNG, metadata after the image data is seen only
    once the image has been loaded.
    """
    from PIL import Image

    if isinstance(img_or_bytes, (bytes, bytearray, memoryview)):
        try:
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")
                img = Image.open(io.BytesIO(bytes(img_or_bytes)))
        except Exception as e:  # noqa: BLE001 - any reader failure means "not an image we can read"
            raise MetadataError(f"not a readable image: {type(e).__name__}: {e}") from e
    else:
        img = img_or_bytes
    places: list[tuple[int, str]] = []
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # Pillow warns on odd EXIF; broken blocks count as absent
        gps = _exif_has_gps(img)
        xmp = _xmp_packet(img.info)
        if xmp:
            xmp_gps, xmp_places = _xmp_location(xmp)
            gps = gps or xmp_gps
            places += xmp_places
        places += _iptc_places(img)
    return gps, _join_places(places)


def _exif_has_gps(img: Any) -> bool:
    from PIL import Image

    try:
        if img.format == "PNG" and "exif" not in img.info:
            # PngImageFile.getexif() would decode the pixels to look after the image data.
            raw = img.info.get("Raw profile type exif")
            if not isinstance(raw, str):
                return False
            exif = Image.Exif()
            exif.load(bytes.fromhex("".join(raw.split("\n")[3:])))
        else:
            exif = img.getexif()
        ifd = exif.get_ifd(_GPS_IFD)
        return bool(ifd.get(_GPS_LATITUDE)) and bool(ifd.get(_GPS_LONGITUDE))
    except Exception:  # noqa: BLE001 - a broken EXIF block is not a broken image
        return False


def _xmp_packet(info: dict) -> bytes | None:
    xmp = info.get("xmp") or info.get("XML:com.adobe.xmp")
    if isinstance(xmp, str):
        xmp = xmp.encode("utf-8", "replace")
    return xmp if isinstance(xmp, (bytes, bytearray)) else None


def _xmp_location(xmp: bytes) -> tuple[bool, list[tuple[int, str]]]:
    """GPS presence and ranked place names from one XMP packet."""
    import xml.etree.ElementTree as ET

    xmp = bytes(xmp).rstrip(b"\x00 \t\r\n")
    # XMP never needs a DTD (XMP Specification Part 1); refusing one rules out entity expansion.
    if b"<!DOCTYPE" not in xmp.upper() and b"<!ENTITY" not in xmp.upper():
        try:
            root = ET.fromstring(xmp)
        except ET.ParseError:
            root = None
        if root is not None:
            places, seen = [], set()
            for el in root.iter():
                for name, value in el.attrib.items():
                    seen.add(name)
                    if name in _XMP_PLACES:
                        places.append((_XMP_PLACES[name], value))
                if el.tag in _XMP_PLACES:
                    seen.add(el.tag)
                    # Simple text, or a language alternative / bag whose first item holds the text.
                    text = (el.text or "").strip() or next(
                        ((li.text or "").strip() for li in el.iter() if li is not el and (li.text or "").strip()), "")
                    places.append((_XMP_PLACES[el.tag], text))
                elif el.tag in _XMP_GPS:
                    seen.add(el.tag)
            return all(t in seen for t in _XMP_GPS), places
    places = [(_RX_RANK[m.group(1).split(b":")[1]], m.group(2).decode("utf-8", "replace"))
              for m in _XMP_PLACE_RX.finditer(xmp)]
    return {m.group(1) for m in _XMP_GPS_RX.finditer(xmp)} == {b"Latitude", b"Longitude"}, places


def _iptc_places(img: Any) -> list[tuple[int, str]]:
    from PIL import IptcImagePlugin

    try:
        iptc = IptcImagePlugin.getiptcinfo(img) or {}
    except Exception:  # noqa: BLE001 - a broken IPTC block is not a broken image
        return []
    out = []
    for key, rank in _IIM_PLACES.items():
        values = iptc.get(key)
        for v in values if isinstance(values, list) else [values] if values else []:
            try:
                out.append((rank, v.decode("utf-8")))
            except UnicodeDecodeError:
                out.append((rank, v.decode("latin-1")))
    return out


def _join_places(places: list[tuple[int, str]]) -> str | None:
    seen: list[str] = []
    for _, value in sorted(places, key=lambda p: p[0]):
        v = " ".join("".join(c if c.isprintable() else " " for c in value).split())
        if v and v.casefold() not in (s.casefold() for s in seen):
            seen.append(v)
    return ", ".join(seen)[:_MAX_PLACE] or None


# ---------------------------------------------------------------------------------------------
# Stripping metadata


def strip_metadata(data: bytes, fmt: str, *, keep_orientation: bool = False) -> bytes:
    """The same image with only the metadata that decoding and colour need; pixels untouched.

    Kept: JPEG JFIF (without its thumbnail), ICC profile and Adobe colour-transform segments
    plus every table, frame and scan segment; PNG critical chunks and the chunks that affect
    colour, transparency, pixel size and animation; WebP image, alpha, animation and ICC
    chunks. Everything else is dropped, data after the end of the image included.
    An image whose EXIF (or XMP) Orientation is not 1 raises NotUprightError unless
    `keep_orientation`, which writes a minimal EXIF block holding only the Orientation.
    Raises MetadataError for bytes that do not parse as `fmt`.
    """
    name = fmt.upper().replace("JPG", "JPEG")
    if name not in STRIPPABLE_FORMATS:
        raise UnsupportedFormatError(f"{fmt}: metadata is removed without re-encoding only from JPEG, PNG and WebP")
    data = bytes(data)
    sniffed = _sniff(data)
    if sniffed is None or (sniffed != name and {sniffed, name} != {"JPEG", "MPO"}):
        raise MetadataError(f"the bytes do not start like a {fmt} file")
    if sniffed == "JPEG":
        return _strip_jpeg(data, keep_orientation)
    if sniffed == "PNG":
        return _strip_png(data, keep_orientation)
    return _strip_webp(data, keep_orientation)


def _sniff(data: bytes) -> str | None:
    if data[:3] == b"\xff\xd8\xff":
        return "JPEG"
    if data[:8] == _PNG_SIGNATURE:
        return "PNG"
    if data[:4] == b"RIFF" and data[8:12] == b"WEBP":
        return "WEBP"
    return None


def _orientation(data: bytes, *, load: bool = False) -> int:
    """Orientation as Pillow reads it (EXIF, then XMP tiff:Orientation); 1 where it is not 2..8."""
    from PIL import Image

    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")  # Pillow warns on odd EXIF; a failure raises below
            img = Image.open(io.BytesIO(data))
            if load:
                img.load()  # PNG: chunks after the image data are read only on load
            value = Image.Image.getexif(img).get(_ORIENTATION, 1)
    except Exception as e:  # noqa: BLE001 - any reader failure: the caller re-encodes
        raise MetadataError(f"cannot read the orientation: {type(e).__name__}: {e}") from e
    try:
        value = int(value)
    except (TypeError, ValueError):
        return 1
    return value if 2 <= value <= 8 else 1  # Pillow's ImageOps.exif_transpose acts on 2..8 only


def _orientation_tiff(orientation: int) -> bytes:
    """A big-endian TIFF structure (TIFF 6.0 sec. 2) with one IFD holding only Orientation (SHORT)."""
    return b"MM\x00\x2a" + struct.pack(">I", 8) + struct.pack(">HHHIHHI", 1, _ORIENTATION, 3, 1, orientation, 0, 0)


def _upright_or_tag(data: bytes, has_meta: bool, keep_orientation: bool, *, load: bool = False) -> bytes | None:
    """None when the image is upright; the minimal EXIF TIFF block to write otherwise."""
    if not has_meta:
        return None
    orientation = _orientation(data, load=load)
    if orientation == 1:
        return None
    if not keep_orientation:
        raise NotUprightError(orientation)
    return _orientation_tiff(orientation)


# JPEG (ITU-T T.81 Annex B). Markers without a length: SOI, EOI, RST0-7, TEM.
_SOI, _EOI, _SOS, _TEM = 0xD8, 0xD9, 0xDA, 0x01


def _keep_jpeg_app(code: int, payload: bytes) -> bytes | None:
    """The segment payload to keep for an APPn/COM segment, or None to drop it."""
    if code == 0xE0 and payload.startswith(b"JFIF\x00") and len(payload) >= 14:
        return payload[:12] + b"\x00\x00"  # JFIF 1.02: no thumbnail (Xthumbnail = Ythumbnail = 0)
    if code == 0xE2 and payload.startswith(b"ICC_PROFILE\x00"):
        return payload  # ICC.1 annex B.4 (from memory): the colour profile, in one or more segments
    if code == 0xEE and payload.startswith(b"Adobe"):
        return payload  # Adobe APP14 colour transform flag: RGB vs YCbCr, CMYK vs YCCK (from memory)
    return None


def _strip_jpeg(data: bytes, keep_orientation: bool) -> bytes:
    n = len(data)
    out: list[bytes] = [b"\xff\xd8"]
    pos, saw_scan, saw_meta, jfif_at = 2, False, False, None
    while True:
        if pos >= n or data[pos] != 0xFF:
            raise MetadataError(f"JPEG: expected a marker at byte {pos}")
        while pos < n and data[pos] == 0xFF:  # fill bytes may precede any marker (T.81 B.1.1.2)
            pos += 1
        if pos >= n:
            raise MetadataError("JPEG: ends inside a marker")
        code = data[pos]
        pos += 1
        if code == _EOI:
            out.append(b"\xff\xd9")
            break
        if code in (0x00, _SOI):
            raise MetadataError(f"JPEG: stray marker 0xFF{code:02X} at byte {pos - 2}")
        if 0xD0 <= code <= 0xD7 or code == _TEM:
            out.append(bytes((0xFF, code)))
            continue
        if pos + 2 > n:
            raise MetadataError("JPEG: ends inside a segment length")
        length = int.from_bytes(data[pos:pos + 2], "big")
        if length < 2 or pos + length > n:
            raise MetadataError(f"JPEG: segment 0xFF{code:02X} at byte {pos - 2} runs past the end")
        payload = data[pos + 2:pos + length]
        end = pos + length
        if 0xE0 <= code <= 0xEF or code == 0xFE:
            saw_meta = saw_meta or code == 0xE1
            kept = _keep_jpeg_app(code, payload)
            if kept is not None:
                if code == 0xE0 and len(out) == 1:
                    jfif_at = len(out)
                out.append(bytes((0xFF, code)) + struct.pack(">H", len(kept) + 2) + kept)
        else:
            out.append(data[pos - 2:end])
        pos = end
        if code == _SOS:
            saw_scan = True
            scan_end = _jpeg_scan_end(data, pos)
            out.append(data[pos:scan_end])
            pos = scan_end
    if not saw_scan:
        raise MetadataError("JPEG: no scan before the end of the image")
    tiff = _upright_or_tag(data, saw_meta, keep_orientation)
    if tiff is not None:
        at = 2 if jfif_at is not None else 1  # EXIF after JFIF APP0 when there is one, else after SOI
        out.insert(at, b"\xff\xe1" + struct.pack(">H", len(tiff) + 8) + b"Exif\x00\x00" + tiff)
    return b"".join(out)


def _jpeg_scan_end(data: bytes, pos: int) -> int:
    """Offset of the marker that ends the entropy-coded data starting at pos."""
    n = len(data)
    while True:
        i = data.find(b"\xff", pos)
        if i < 0:
            raise MetadataError("JPEG: scan data runs to the end of the file (truncated)")
        j = i + 1
        while j < n and data[j] == 0xFF:
            j += 1
        if j >= n:
            raise MetadataError("JPEG: scan data runs to the end of the file (truncated)")
        if data[j] == 0x00 or 0xD0 <= data[j] <= 0xD7:  # stuffed byte or restart marker
            pos = j + 1
            continue
        return i


# PNG (ISO/IEC 15948, W3C PNG third edition).
_PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"
# Ancillary chunks kept: colour space, transparency, pixel size, significant bits, background,
# histogram, suggested palette, and the APNG animation chunks. Everything else ancillary goes:
# eXIf, tEXt/zTXt/iTXt (XMP, "Raw profile" EXIF and IPTC, authors, comments), tIME, and chunks
# this list does not know.
_PNG_KEEP = {
    b"IHDR", b"PLTE", b"IDAT", b"IEND", b"tRNS", b"gAMA", b"cHRM", b"sRGB", b"iCCP", b"cICP",
    b"mDCV", b"mDCv", b"cLLI", b"cLLi", b"sBIT", b"bKGD", b"pHYs", b"hIST", b"sPLT",
    b"acTL", b"fcTL", b"fdAT",
}
_PNG_META = {b"eXIf", b"tEXt", b"zTXt", b"iTXt"}


def _png_chunk(ctype: bytes, body: bytes) -> bytes:
    return struct.pack(">I", len(body)) + ctype + body + struct.pack(">I", zlib.crc32(ctype + body))


def _strip_png(data: bytes, keep_orientation: bool) -> bytes:
    n, pos = len(data), len(_PNG_SIGNATURE)
    out: list[bytes] = [_PNG_SIGNATURE]
    first_idat, saw_meta, meta_after_idat, saw_end = None, False, False, False
    while pos < n:
        if pos + 12 > n:
            raise MetadataError(f"PNG: chunk header at byte {pos} runs past the end")
        length = int.from_bytes(data[pos:pos + 4], "big")
        ctype = data[pos + 4:pos + 8]
        if length > 0x7FFFFFFF or pos + 12 + length > n:
            raise MetadataError(f"PNG: chunk {ctype!r} at byte {pos} runs past the end")
        if not (ctype.isascii() and ctype.isalpha()):
            raise MetadataError(f"PNG: bad chunk type {ctype!r} at byte {pos}")
        body_end = pos + 8 + length
        if zlib.crc32(data[pos + 4:body_end]) != int.from_bytes(data[body_end:body_end + 4], "big"):
            raise MetadataError(f"PNG: bad CRC in chunk {ctype.decode()} at byte {pos}")
        if len(out) == 1 and ctype != b"IHDR":
            raise MetadataError("PNG: the first chunk is not IHDR")
        if ctype == b"IDAT" and first_idat is None:
            first_idat = len(out)
        if ctype in _PNG_META:
            saw_meta = True
            meta_after_idat = meta_after_idat or first_idat is not None
        # Unknown critical chunks (upper-case first letter) stay: decoding may need them.
        if ctype in _PNG_KEEP or ctype[:1].isupper():
            out.append(data[pos:body_end + 4])
        pos = body_end + 4
        if ctype == b"IEND":
            saw_end = True
            break
    if not saw_end or first_idat is None:
        raise MetadataError("PNG: no image data or no IEND chunk (truncated)")
    tiff = _upright_or_tag(data, saw_meta, keep_orientation, load=meta_after_idat)
    if tiff is not None:
        out.insert(first_idat, _png_chunk(b"eXIf", tiff))  # eXIf goes before the image data
    return b"".join(out)


# WebP (RIFF container, RFC 9649). VP8X flags byte: ICC 0x20, alpha 0x10, EXIF 0x08, XMP 0x04,
# animation 0x02 (from memory; the tests check them against files libwebp writes through Pillow).
_WEBP_KEEP = {b"VP8X", b"ICCP", b"ANIM", b"ANMF", b"ALPH", b"VP8 ", b"VP8L"}
_VP8X_EXIF, _VP8X_XMP = 0x08, 0x04


def _riff_chunk(fourcc: bytes, body: bytes) -> bytes:
    return fourcc + struct.pack("<I", len(body)) + body + (b"\x00" if len(body) % 2 else b"")


def _strip_webp(data: bytes, keep_orientation: bool) -> bytes:
    size = int.from_bytes(data[4:8], "little")
    end = 8 + size
    if size < 4 or end > len(data):
        raise MetadataError("WebP: the RIFF size runs past the end of the file (truncated)")
    pos, chunks, saw_meta = 12, [], False
    while pos < end:
        if pos + 8 > end:
            raise MetadataError(f"WebP: chunk header at byte {pos} runs past the end")
        fourcc = data[pos:pos + 4]
        length = int.from_bytes(data[pos + 4:pos + 8], "little")
        if pos + 8 + length > end:
            raise MetadataError(f"WebP: chunk {fourcc!r} at byte {pos} runs past the end")
        body = data[pos + 8:pos + 8 + length]
        saw_meta = saw_meta or fourcc in (b"EXIF", b"XMP ")
        if fourcc in _WEBP_KEEP:
            chunks.append((fourcc, body))
        pos += 8 + length + (length & 1)
    if not chunks or chunks[0][0] not in (b"VP8X", b"VP8 ", b"VP8L"):
        raise MetadataError("WebP: no image chunk")
    tiff = _upright_or_tag(data, saw_meta, keep_orientation)
    if tiff is not None and chunks[0][0] != b"VP8X":
        raise MetadataError("WebP: a simple-format file cannot carry the Orientation")
    if chunks[0][0] == b"VP8X":
        if len(chunks[0][1]) < 10:
            raise MetadataError("WebP: VP8X chunk too short")
        flags = chunks[0][1][0] & ~(_VP8X_EXIF | _VP8X_XMP) | (_VP8X_EXIF if tiff is not None else 0)
        chunks[0] = (b"VP8X", bytes((flags,)) + chunks[0][1][1:])
        if tiff is not None:
            chunks.append((b"EXIF", tiff))  # metadata chunks follow the image data (RFC 9649)
    body = b"WEBP" + b"".join(_riff_chunk(f, b) for f, b in chunks)
    return b"RIFF" + struct.pack("<I", len(body)) + body
