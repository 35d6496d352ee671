"""Location metadata and metadata stripping (curate.imaging.metadata), read back with Pillow, exifread and piexif.

Test images are public photos shipped with scikit-image (skimage.data.astronaut: NASA photo of
Eileen Collins; skimage.data.coffee: Rachel Michetti's cup of coffee), saved by Pillow with
metadata written into them here. The planted names, serial numbers and coordinates are invented
test data: each must be visible in the input and gone from the output.
"""
from __future__ import annotations

import functools
import io
import struct
import zlib

import exifread
import numpy as np
import piexif
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from PIL import Image, ImageCms, ImageOps, IptcImagePlugin, PngImagePlugin

from curate.imaging.metadata import (
    MetadataError,
    NotUprightError,
    UnsupportedFormatError,
    read_location,
    strip_metadata,
)

BODY_SERIAL, LENS_SERIAL, OWNER = "BODY-4471-2209", "LENS-8812-0034", "Jo Potter"
SUBLOCATION, CITY, STATE, COUNTRY = "Hallgrimskirkja", "Reykjavik", "Hofudborgarsvaedid", "Iceland"
XMP_CITY, XMP_COUNTRY = "Akureyri", "Island"
PLANTED = (BODY_SERIAL, LENS_SERIAL, OWNER, SUBLOCATION, CITY, STATE, COUNTRY, XMP_CITY, XMP_COUNTRY)
LAT, LON = (64.0, 8.0, 30.0), (21.0, 55.0, 37.0)

# EXIF 2.3 (CIPA DC-008) tag numbers.
MAKE, MODEL, ORIENTATION, EXIF_IFD, GPS_IFD = 0x010F, 0x0110, 0x0112, 0x8769, 0x8825
OWNER_NAME, BODY_SERIAL_NUMBER, LENS_SERIAL_NUMBER = 0xA430, 0xA431, 0xA435
GPS_LAT_REF, GPS_LAT, GPS_LON_REF, GPS_LON = 1, 2, 3, 4


# ---- building test files -------------------------------------------------------------------


@functools.cache
def astronaut() -> Image.Image:
    from skimage import data

    return Image.fromarray(data.astronaut())  # scikit-image sample: NASA photo, public domain


@functools.cache
def coffee() -> Image.Image:
    from skimage import data

    return Image.fromarray(data.coffee())  # scikit-image sample: Rachel Michetti, CC0


def exif_pillow(orientation: int | None = None, gps: bool = True) -> bytes:
    """EXIF built with Pillow's Image.Exif: camera, serial numbers, owner, GPS IFD."""
    ex = Image.Exif()
    ex[MAKE], ex[MODEL] = "Kiln", "K-1"
    if orientation is not None:
        ex[ORIENTATION] = orientation
    sub = ex.get_ifd(EXIF_IFD)
    sub[OWNER_NAME], sub[BODY_SERIAL_NUMBER], sub[LENS_SERIAL_NUMBER] = OWNER, BODY_SERIAL, LENS_SERIAL
    if gps:
        g = ex.get_ifd(GPS_IFD)
        g[GPS_LAT_REF], g[GPS_LAT], g[GPS_LON_REF], g[GPS_LON] = "N", LAT, "W", LON
    return ex.tobytes()


def exif_piexif(orientation: int | None = None) -> bytes:
    """The same EXIF built with piexif.dump, a second writer."""
    zeroth = {MAKE: b"Kiln", MODEL: b"K-1"}
    if orientation is not None:
        zeroth[ORIENTATION] = orientation
    rat = lambda t: tuple((int(v), 1) for v in t)  # noqa: E731
    return piexif.dump({
        "0th": zeroth,
        "Exif": {OWNER_NAME: OWNER.encode(), BODY_SERIAL_NUMBER: BODY_SERIAL.encode(),
                 LENS_SERIAL_NUMBER: LENS_SERIAL.encode()},
        "GPS": {GPS_LAT_REF: b"N", GPS_LAT: rat(LAT), GPS_LON_REF: b"W", GPS_LON: rat(LON)},
    })


def xmp_packet(extra: str = "") -> bytes:
    """An XMP packet (XMP Specification Part 1) with place names in attribute and element form and GPS."""
    return f"""<?xpacket begin="\ufeff" id="W5M0MpCehiHzreSzNTczkc9d"?>
<x:xmpmeta xmlns:x="adobe:ns:meta/"><rdf:RDF xmlns:rdf="http://www.w3.org/1999/02/22-rdf-syntax-ns#">
<rdf:Description rdf:about="" xmlns:photoshop="http://ns.adobe.com/photoshop/1.0/"
  xmlns:exif="http://ns.adobe.com/exif/1.0/" xmlns:tiff="http://ns.adobe.com/tiff/1.0/"
  photoshop:City="{XMP_CITY}" exif:GPSLatitude="65,41.0N" exif:GPSLongitude="18,05.0W"{extra}>
 <photoshop:Country>{XMP_COUNTRY}</photoshop:Country>
</rdf:Description></rdf:RDF></x:xmpmeta>
<?xpacket end="w"?>""".encode()


def iim(fields: dict[tuple[int, int], str]) -> bytes:
    """IPTC IIM datasets: 0x1C, record, dataset, 2-byte length, data (IPTC-NAA IIM 4.2 sec. 1.5, from memory)."""
    return b"".join(b"\x1c" + bytes(k) + struct.pack(">H", len(v.encode())) + v.encode() for k, v in fields.items())


def iptc_app13(fields: dict[tuple[int, int], str]) -> bytes:
    """An APP13 "Photoshop 3.0" segment holding one 8BIM resource 0x0404 (IPTC-NAA record), per the
    Adobe Photoshop File Formats Specification's image resource blocks (from memory; Pillow's
    IptcImagePlugin reads it back in test_iptc_builder_is_read_by_pillow)."""
    data = iim(fields)
    block = b"8BIM" + struct.pack(">H", 0x0404) + b"\x00\x00" + struct.pack(">I", len(data)) + data
    block += b"\x00" * (len(data) % 2)
    payload = b"Photoshop 3.0\x00" + block
    return b"\xff\xed" + struct.pack(">H", len(payload) + 2) + payload


IPTC_PLACES = {(2, 92): SUBLOCATION, (2, 90): CITY, (2, 95): STATE, (2, 101): COUNTRY}


def after_soi(jpeg: bytes, segment: bytes) -> bytes:
    return jpeg[:2] + segment + jpeg[2:]


def save(img: Image.Image, fmt: str, **kw) -> bytes:
    buf = io.BytesIO()
    img.save(buf, fmt, **kw)
    return buf.getvalue()


@functools.cache
def srgb_icc() -> bytes:
    return ImageCms.ImageCmsProfile(ImageCms.createProfile("sRGB")).tobytes()


@functools.cache
def full_jpeg(writer: str = "pillow") -> bytes:
    """astronaut as JPEG with EXIF (GPS, serials, owner), ICC, XMP and IPTC place fields."""
    exif = exif_pillow() if writer == "pillow" else exif_piexif()
    data = save(astronaut(), "JPEG", quality=90, exif=exif, icc_profile=srgb_icc(), xmp=xmp_packet(), dpi=(300, 300))
    return after_soi(data, iptc_app13(IPTC_PLACES))


# Independent readers of the container structure, for checking what the output holds.


def jpeg_segments(data: bytes) -> list[tuple[int, bytes]]:
    """(marker, payload) of each segment up to the first SOS (ITU-T T.81 B.1.1)."""
    assert data[:2] == b"\xff\xd8"
    pos, out = 2, []
    while True:
        marker = data[pos + 1]
        length = struct.unpack(">H", data[pos + 2:pos + 4])[0]
        out.append((marker, data[pos + 4:pos + 2 + length]))
        if marker == 0xDA:
            return out
        pos += 2 + length


def png_chunks(data: bytes) -> list[tuple[bytes, bytes]]:
    """(type, body) of each chunk, checking every CRC (ISO/IEC 15948 sec. 5.3)."""
    assert data[:8] == b"\x89PNG\r\n\x1a\n"
    pos, out = 8, []
    while pos < len(data):
        length = struct.unpack(">I", data[pos:pos + 4])[0]
        ctype, body = data[pos + 4:pos + 8], data[pos + 8:pos + 8 + length]
        assert struct.unpack(">I", data[pos + 8 + length:pos + 12 + length])[0] == zlib.crc32(ctype + body)
        out.append((ctype, body))
        pos += 12 + length
    return out


def png_with_chunk_before_iend(data: bytes, ctype: bytes, body: bytes) -> bytes:
    chunk = struct.pack(">I", len(body)) + ctype + body + struct.pack(">I", zlib.crc32(ctype + body))
    return data[:-12] + chunk + data[-12:]


def riff_chunks(data: bytes) -> list[tuple[bytes, bytes]]:
    """(fourcc, payload) of each top-level chunk of a RIFF WebP file (RFC 9649)."""
    assert data[:4] == b"RIFF" and data[8:12] == b"WEBP"
    assert struct.unpack("<I", data[4:8])[0] == len(data) - 8
    pos, out = 12, []
    while pos < len(data):
        size = struct.unpack("<I", data[pos + 4:pos + 8])[0]
        out.append((data[pos:pos + 4], data[pos + 8:pos + 8 + size]))
        pos += 8 + size + (size & 1)
    return out


def pixels(data: bytes, frame: int = 0) -> np.ndarray:
    im = Image.open(io.BytesIO(data))
    im.seek(frame)
    return np.asarray(im.convert("RGBA") if im.mode == "P" else im)


def assert_clean(out: bytes) -> None:
    """No GPS, serials, owner, XMP or IPTC, by Pillow, by exifread, by piexif and in the raw bytes."""
    im = Image.open(io.BytesIO(out))
    exif = im.getexif()
    assert set(exif) <= {ORIENTATION}  # the Orientation alone may stay (keep_orientation)
    assert not exif.get_ifd(GPS_IFD) and not exif.get_ifd(EXIF_IFD)
    assert not {k for k in im.info if "xmp" in k.lower() or k == "photoshop" or k.startswith("Raw profile")}
    if im.format == "JPEG":
        assert IptcImagePlugin.getiptcinfo(im) is None
    tags = exifread.process_file(io.BytesIO(out), details=True)  # reads JPEG and PNG; piexif reads WebP
    assert not [k for k in tags if k.startswith("GPS") or "Serial" in k or "Owner" in k or "MakerNote" in k]
    if im.format in ("JPEG", "WEBP"):
        d = piexif.load(out)
        assert d["GPS"] == {} and d["Exif"] == {} and d["thumbnail"] is None and set(d["0th"]) <= {ORIENTATION}
    for planted in PLANTED:
        assert planted.encode() not in out, planted
    assert read_location(out) == (False, None)


# ---- the test files hold what they claim (so every later check can fail) --------------------


def test_iptc_builder_is_read_by_pillow():
    # Pillow's IptcImagePlugin is the outside reader of the APP13 block built above.
    im = Image.open(io.BytesIO(full_jpeg()))
    assert IptcImagePlugin.getiptcinfo(im) == {k: v.encode() for k, v in IPTC_PLACES.items()}


@pytest.mark.parametrize("writer", ["pillow", "piexif"])
def test_planted_metadata_is_visible_to_all_readers(writer):
    data = full_jpeg(writer)
    im = Image.open(io.BytesIO(data))
    assert im.getexif().get_ifd(GPS_IFD)[GPS_LAT] == LAT
    assert im.getexif().get_ifd(EXIF_IFD)[BODY_SERIAL_NUMBER] == BODY_SERIAL
    tags = exifread.process_file(io.BytesIO(data), details=True)
    assert "GPS GPSLatitude" in tags and str(tags["EXIF BodySerialNumber"]) == BODY_SERIAL
    d = piexif.load(data)
    assert d["GPS"][GPS_LAT] == ((64, 1), (8, 1), (30, 1)) and d["Exif"][LENS_SERIAL_NUMBER] == LENS_SERIAL.encode()
    assert XMP_CITY.encode() in im.info["xmp"]


@pytest.mark.parametrize("fmt", ["JPEG", "PNG", "WEBP"])
def test_second_readers_see_the_planted_gps(fmt):
    # The second reader for each format (exifread for JPEG and PNG, piexif for JPEG and WebP)
    # sees the GPS IFD in the input, so its silence on the output means something.
    data = samples()[fmt]
    if fmt in ("JPEG", "PNG"):
        assert "GPS GPSLatitude" in exifread.process_file(io.BytesIO(data))
    if fmt in ("JPEG", "WEBP"):
        assert piexif.load(data)["GPS"][GPS_LAT] == ((64, 1), (8, 1), (30, 1))


# ---- read_location -----------------------------------------------------------------------------


def test_read_location_jpeg():
    # GPS from the EXIF GPS IFD; places from IPTC (2:92, 2:90, 2:95, 2:101) and XMP, most specific first.
    # Within a rank the XMP value comes before the IPTC one.
    assert read_location(full_jpeg()) == (True, ", ".join([SUBLOCATION, XMP_CITY, CITY, STATE, XMP_COUNTRY, COUNTRY]))


def test_read_location_takes_an_open_image():
    im = Image.open(io.BytesIO(full_jpeg("piexif")))
    assert read_location(im) == read_location(full_jpeg("piexif"))
    assert im.tile  # pixels were not decoded (Pillow empties the tile list on load)


@pytest.mark.parametrize("source", ["exif", "iptc", "xmp", "none", "gps_version_only"])
def test_read_location_each_source(source):
    plain = save(astronaut(), "JPEG")
    if source == "exif":
        data, want = save(astronaut(), "JPEG", exif=exif_pillow()), (True, None)
    elif source == "iptc":
        data, want = after_soi(plain, iptc_app13({(2, 90): CITY})), (False, CITY)
    elif source == "xmp":
        data, want = save(astronaut(), "JPEG", xmp=xmp_packet()), (True, f"{XMP_CITY}, {XMP_COUNTRY}")
    elif source == "none":
        data, want = plain, (False, None)
    else:
        ex = Image.Exif()
        ex.get_ifd(GPS_IFD)[0] = b"\x02\x03\x00\x00"  # GPSVersionID only: no position (EXIF 2.3)
        data, want = save(astronaut(), "JPEG", exif=ex.tobytes()), (False, None)
    assert read_location(data) == want


def test_read_location_png_and_webp():
    info = PngImagePlugin.PngInfo()
    info.add_itxt("XML:com.adobe.xmp", xmp_packet().decode())
    png = save(astronaut(), "PNG", exif=exif_pillow(), pnginfo=info)
    webp = save(astronaut(), "WEBP", exif=exif_piexif(), xmp=xmp_packet())
    for data in (png, webp):
        assert read_location(data) == (True, f"{XMP_CITY}, {XMP_COUNTRY}")


@pytest.mark.parametrize(
    "body,want",
    [
        # IPTC Photo Metadata Standard: LocationCreated is a bag of structures.
        ('<Iptc4xmpExt:LocationCreated><rdf:Bag><rdf:li rdf:parseType="Resource"><Iptc4xmpExt:City>Vik</Iptc4xmpExt:City>'
         '<Iptc4xmpExt:CountryName>Iceland</Iptc4xmpExt:CountryName></rdf:li></rdf:Bag></Iptc4xmpExt:LocationCreated>',
         (False, "Vik, Iceland")),
        # LocationName is a language alternative: the text sits in rdf:li.
        ('<Iptc4xmpExt:LocationShown><rdf:Bag><rdf:li rdf:parseType="Resource"><Iptc4xmpExt:LocationName><rdf:Alt>'
         '<rdf:li xml:lang="x-default">Black beach</rdf:li></rdf:Alt></Iptc4xmpExt:LocationName></rdf:li></rdf:Bag>'
         '</Iptc4xmpExt:LocationShown>', (False, "Black beach")),
        ("<Iptc4xmpCore:Location>Harbour</Iptc4xmpCore:Location>", (False, "Harbour")),
        ("<exif:GPSLatitude>63,25.0N</exif:GPSLatitude><exif:GPSLongitude>19,0.5W</exif:GPSLongitude>", (True, None)),
        ("<exif:GPSLatitude>63,25.0N</exif:GPSLatitude>", (False, None)),  # latitude alone is not a position
    ],
)
def test_read_location_xmp_forms(body, want):
    packet = (
        '<x:xmpmeta xmlns:x="adobe:ns:meta/"><rdf:RDF xmlns:rdf="http://www.w3.org/1999/02/22-rdf-syntax-ns#">'
        '<rdf:Description rdf:about="" xmlns:Iptc4xmpExt="http://iptc.org/std/Iptc4xmpExt/2008-02-29/" '
        'xmlns:Iptc4xmpCore="http://iptc.org/std/Iptc4xmpCore/1.0/xmlns/" xmlns:exif="http://ns.adobe.com/exif/1.0/">'
        f"{body}</rdf:Description></rdf:RDF></x:xmpmeta>"
    ).encode()
    assert read_location(save(astronaut(), "JPEG", xmp=packet)) == want


def test_read_location_hostile_xmp():
    # Not well-formed: the customary prefixes are still read. A DTD: entities are never expanded.
    broken = b'<x:xmpmeta><rdf:Description photoshop:City="Selfoss" exif:GPSLatitude="64,0N"'
    assert read_location(save(astronaut(), "JPEG", xmp=broken)) == (False, "Selfoss")
    bomb = (b'<?xml version="1.0"?><!DOCTYPE x [<!ENTITY a "aaaaaaaaaa"><!ENTITY b "&a;&a;&a;&a;&a;&a;&a;&a;&a;&a;">'
            b'<!ENTITY c "&b;&b;&b;&b;&b;&b;&b;&b;&b;&b;">]><x><photoshop:City>&c;</photoshop:City></x>')
    gps, place = read_location(save(astronaut(), "JPEG", xmp=bomb))
    assert gps is False and (place is None or "aaaa" not in place)


def test_read_location_tiff():
    # TIFF keeps the GPS IFD pointer in its own IFD0 (TIFF 6.0 + EXIF 2.3); Pillow reads it.
    assert read_location(save(astronaut(), "TIFF", exif=exif_pillow())) == (True, None)


@given(fmt=st.sampled_from(["JPEG", "PNG", "WEBP"]),
       edits=st.lists(st.tuples(st.floats(0, 1, exclude_max=True), st.integers(0, 255)), min_size=1, max_size=8))
@settings(max_examples=150, deadline=None)
def test_read_location_on_corrupted_bytes(fmt, edits):
    data = bytearray(samples()[fmt])
    for where, value in edits:
        data[int(where * min(len(data), 4000))] = value
    try:
        gps, place = read_location(bytes(data))
    except MetadataError:
        return
    assert isinstance(gps, bool) and (place is None or isinstance(place, str))


def test_read_location_garbage():
    with pytest.raises(MetadataError):
        read_location(b"not an image at all")


# ---- strip_metadata: JPEG ---------------------------------------------------------------------


@pytest.mark.parametrize("writer", ["pillow", "piexif"])
def test_strip_jpeg(writer):
    data = full_jpeg(writer)
    out = strip_metadata(data, "JPEG")
    assert_clean(out)
    im = Image.open(io.BytesIO(out))
    assert im.info["icc_profile"] == srgb_icc() and im.info["dpi"] == (300, 300)  # ICC and JFIF kept
    assert [m for m, _ in jpeg_segments(out)] == [0xE0, 0xE2, 0xDB, 0xDB, 0xC0, 0xC4, 0xC4, 0xC4, 0xC4, 0xDA]
    assert np.array_equal(pixels(data), pixels(out))
    # Tables, frame header and scan data are byte-identical: the output's tail from the first
    # DQT to EOI is the input's tail.
    assert data.endswith(out[out.index(b"\xff\xdb"):])


@pytest.mark.parametrize("kind", ["progressive", "restart", "cmyk", "grey"])
def test_strip_jpeg_variants(kind):
    img = astronaut()
    if kind == "progressive":
        data = save(img, "JPEG", progressive=True, exif=exif_pillow())
    elif kind == "restart":
        data = save(img, "JPEG", restart_marker_blocks=4, exif=exif_pillow())  # RST markers in the scan
        assert b"\xff\xd0" in data
    elif kind == "cmyk":
        data = save(img.convert("CMYK"), "JPEG", exif=exif_pillow())
    else:
        data = save(img.convert("L"), "JPEG", exif=exif_pillow())
    data = after_soi(data, iptc_app13(IPTC_PLACES))
    out = strip_metadata(data, "JPEG")
    assert_clean(out)
    assert np.array_equal(pixels(data), pixels(out))
    assert data.endswith(out[out.index(b"\xff\xdb"):])
    if kind == "cmyk":
        assert 0xEE in [m for m, _ in jpeg_segments(out)]


def test_strip_mpo_keeps_the_first_image_only():
    # Multi-picture files (CIPA DC-007): the secondary images follow the first EOI with their own EXIF.
    buf = io.BytesIO()
    astronaut().save(buf, "MPO", save_all=True, append_images=[coffee().resize((512, 512))], exif=exif_pillow())
    data = buf.getvalue()
    assert Image.open(io.BytesIO(data)).n_frames == 2
    out = strip_metadata(data, "MPO")
    im = Image.open(io.BytesIO(out))
    assert im.format == "JPEG" and getattr(im, "n_frames", 1) == 1 and "mp" not in im.info
    assert_clean(out)
    assert np.array_equal(pixels(data), pixels(out))


def test_strip_jpeg_drops_the_jfif_thumbnail():
    # JFIF 1.02: APP0 may carry an uncompressed RGB thumbnail (Xthumbnail x Ythumbnail x 3 bytes).
    data = save(astronaut(), "JPEG")
    segs = jpeg_segments(data)
    assert segs[0][0] == 0xE0 and segs[0][1][12:14] == b"\x00\x00"
    app0 = segs[0][1][:12] + b"\x02\x02" + bytes(12)
    with_thumb = data[:2] + b"\xff\xe0" + struct.pack(">H", len(app0) + 2) + app0 + data[2 + 2 + len(segs[0][1]) + 2:]
    out = strip_metadata(with_thumb, "JPEG")
    assert jpeg_segments(out)[0] == (0xE0, segs[0][1][:12] + b"\x00\x00")
    assert np.array_equal(pixels(data), pixels(out))


# ---- orientation ---------------------------------------------------------------------------------


@pytest.mark.parametrize("fmt", ["JPEG", "WEBP"])
def test_orientation(fmt):
    data = save(astronaut(), fmt, exif=exif_pillow(orientation=6), quality=90)
    with pytest.raises(NotUprightError) as e:
        strip_metadata(data, fmt)
    assert e.value.orientation == 6
    out = strip_metadata(data, fmt, keep_orientation=True)
    assert_clean(out)
    # Only the Orientation remains, by Pillow, piexif and exifread.
    assert dict(Image.open(io.BytesIO(out)).getexif()) == {ORIENTATION: 6}
    assert piexif.load(out)["0th"] == {ORIENTATION: 6}
    if fmt == "JPEG":  # exifread 3.5 reads no EXIF from WebP files (not even libwebp's own)
        assert str(exifread.process_file(io.BytesIO(out))["Image Orientation"]) == "Rotated 90 CW"
    shown = lambda b: np.asarray(ImageOps.exif_transpose(Image.open(io.BytesIO(b))))  # noqa: E731
    assert np.array_equal(shown(data), shown(out))


def test_upright_orientation_leaves_no_exif():
    data = save(astronaut(), "JPEG", exif=exif_pillow(orientation=1))
    out = strip_metadata(data, "JPEG", keep_orientation=True)
    assert 0xE1 not in [m for m, _ in jpeg_segments(out)]


def test_orientation_from_xmp_counts():
    # Pillow's getexif falls back to XMP tiff:Orientation; dropping the XMP would turn the image.
    data = save(astronaut(), "JPEG", xmp=xmp_packet(' tiff:Orientation="8"'))
    assert Image.open(io.BytesIO(data)).getexif()[ORIENTATION] == 8
    with pytest.raises(NotUprightError):
        strip_metadata(data, "JPEG")
    out = strip_metadata(data, "JPEG", keep_orientation=True)
    assert dict(Image.open(io.BytesIO(out)).getexif()) == {ORIENTATION: 8}


# ---- strip_metadata: PNG -------------------------------------------------------------------------


@functools.cache
def full_png() -> bytes:
    info = PngImagePlugin.PngInfo()
    info.add_text("Author", OWNER)
    info.add_text("Comment", f"taken at {CITY}", zip=True)
    info.add_itxt("XML:com.adobe.xmp", xmp_packet().decode())
    return save(astronaut(), "PNG", exif=exif_pillow(), pnginfo=info, icc_profile=srgb_icc(), dpi=(300, 300))


def test_strip_png():
    data = full_png()
    assert {b"eXIf", b"tEXt", b"zTXt", b"iTXt", b"iCCP", b"pHYs"} <= {t for t, _ in png_chunks(data)}
    out = strip_metadata(data, "PNG")
    assert_clean(out)
    chunks = png_chunks(out)  # every CRC checked
    assert [t for t, _ in chunks if t != b"IDAT"] == [b"IHDR", b"iCCP", b"pHYs", b"IEND"]
    idat = lambda b: [body for t, body in png_chunks(b) if t == b"IDAT"]  # noqa: E731
    assert idat(out) == idat(data)
    assert np.array_equal(pixels(data), pixels(out))
    assert Image.open(io.BytesIO(out)).info["icc_profile"] == srgb_icc()


def test_strip_png_metadata_after_the_image_data():
    # eXIf after IDAT: Pillow reads it once the image is loaded (the reference reader below).
    plain = save(astronaut(), "PNG")
    data = png_with_chunk_before_iend(plain, b"eXIf", exif_pillow()[6:])
    im = Image.open(io.BytesIO(data))
    im.load()
    assert im.getexif().get_ifd(GPS_IFD)[GPS_LAT] == LAT
    out = strip_metadata(data, "PNG")
    assert out == plain
    turned = png_with_chunk_before_iend(plain, b"eXIf", exif_pillow(orientation=3)[6:])
    with pytest.raises(NotUprightError):
        strip_metadata(turned, "PNG")


def test_strip_png_raw_profile_exif():
    # ImageMagick-style "Raw profile type exif" text: Pillow's getexif reads its Orientation.
    hexed = exif_pillow(orientation=6).hex()
    info = PngImagePlugin.PngInfo()
    info.add_text("Raw profile type exif", f"\nexif\n{len(hexed) // 2}\n{hexed}", zip=True)
    data = save(astronaut(), "PNG", pnginfo=info)
    assert Image.open(io.BytesIO(data)).getexif()[ORIENTATION] == 6
    with pytest.raises(NotUprightError):
        strip_metadata(data, "PNG")
    out = strip_metadata(data, "PNG", keep_orientation=True)
    assert_clean(out)
    assert [t for t, _ in png_chunks(out)][:3] == [b"IHDR", b"eXIf", b"IDAT"]
    assert dict(Image.open(io.BytesIO(out)).getexif()) == {ORIENTATION: 6}
    shown = lambda b: np.asarray(ImageOps.exif_transpose(Image.open(io.BytesIO(b))))  # noqa: E731
    assert np.array_equal(shown(data), shown(out))


def test_strip_png_palette_and_transparency():
    img = coffee().convert("P", palette=Image.Palette.ADAPTIVE, colors=64)
    data = save(img, "PNG", transparency=0, exif=exif_pillow())
    out = strip_metadata(data, "PNG")
    assert [t for t, _ in png_chunks(out) if t != b"IDAT"] == [b"IHDR", b"PLTE", b"tRNS", b"IEND"]
    assert np.array_equal(pixels(data), pixels(out))
    assert_clean(out)


# ---- strip_metadata: WebP ------------------------------------------------------------------------


@pytest.mark.parametrize("mode", ["lossy", "lossless", "alpha", "animated"])
def test_strip_webp(mode):
    img = astronaut()
    kw = dict(exif=exif_pillow(), xmp=xmp_packet(), icc_profile=srgb_icc())
    if mode == "lossless":
        kw["lossless"] = True
    elif mode == "alpha":
        img = img.convert("RGBA")
        img.putalpha(128)
    elif mode == "animated":
        kw.update(save_all=True, append_images=[coffee().resize(img.size)], lossless=True)
    data = save(img, "WEBP", **kw)
    before = riff_chunks(data)
    # VP8X flags written by libwebp (through Pillow): ICC 0x20, EXIF 0x08, XMP 0x04 set.
    assert before[0][0] == b"VP8X" and before[0][1][0] & 0x2C == 0x2C
    out = strip_metadata(data, "WEBP")
    after = riff_chunks(out)  # checks the RIFF size
    # EXIF and XMP flags cleared, the rest of VP8X (ICC, alpha, animation, canvas size) kept.
    assert after[0][1][0] == before[0][1][0] & ~0x0C and after[0][1][1:] == before[0][1][1:]
    # Every other chunk (ICCP, ANIM, ANMF, ALPH, VP8, VP8L) byte-identical, in order.
    assert after[1:] == [c for c in before[1:] if c[0] not in (b"EXIF", b"XMP ")]
    assert_clean(out)
    n = Image.open(io.BytesIO(data)).n_frames
    assert Image.open(io.BytesIO(out)).n_frames == n
    assert all(np.array_equal(pixels(data, i), pixels(out, i)) for i in range(n))


def test_strip_simple_webp_is_unchanged():
    # RFC 9649: the simple format (one VP8 chunk, no VP8X) has no room for metadata.
    data = save(astronaut(), "WEBP")
    assert riff_chunks(data)[0][0] == b"VP8 "
    assert strip_metadata(data, "WEBP") == data


# ---- formats, idempotence, hostile input ----------------------------------------------------------


@pytest.mark.parametrize("fmt", ["GIF", "BMP", "TIFF"])
def test_other_formats_are_refused(fmt):
    # GIF, BMP and TIFF are re-encoded by the shard writer instead.
    with pytest.raises(UnsupportedFormatError):
        strip_metadata(save(astronaut(), fmt), fmt)


def test_format_must_match_the_bytes():
    with pytest.raises(MetadataError):
        strip_metadata(full_png(), "JPEG")
    assert strip_metadata(full_jpeg(), "jpg") == strip_metadata(full_jpeg(), "JPEG")


@functools.cache
def samples() -> dict[str, bytes]:
    return {"JPEG": full_jpeg(), "PNG": full_png(),
            "WEBP": save(astronaut(), "WEBP", exif=exif_pillow(), xmp=xmp_packet(), icc_profile=srgb_icc())}


@pytest.mark.parametrize("fmt", ["JPEG", "PNG", "WEBP"])
def test_idempotent(fmt):
    once = strip_metadata(samples()[fmt], fmt)
    assert strip_metadata(once, fmt) == once


@given(fmt=st.sampled_from(["JPEG", "PNG", "WEBP"]), frac=st.floats(0, 1, exclude_max=True))
@settings(max_examples=150, deadline=None)
def test_every_truncation_is_a_metadata_error(fmt, frac):
    data = samples()[fmt]
    with pytest.raises(MetadataError):
        strip_metadata(data[:int(frac * len(data))], fmt)


@given(fmt=st.sampled_from(["JPEG", "PNG", "WEBP"]),
       edits=st.lists(st.tuples(st.floats(0, 1, exclude_max=True), st.integers(0, 255)), min_size=1, max_size=8))
@settings(max_examples=200, deadline=None)
def test_corrupted_bytes_never_crash(fmt, edits):
    data = bytearray(samples()[fmt])
    for where, value in edits:
        data[int(where * min(len(data), 4000))] = value  # the headers, where the structure is
    try:
        out = strip_metadata(bytes(data), fmt)
    except MetadataError:
        return
    assert isinstance(out, bytes) and out[:2] == bytes(data[:2])


def test_hostile_jpeg_segments():
    soi = b"\xff\xd8"
    with pytest.raises(MetadataError, match="past the end"):  # APP1 length runs past the end
        strip_metadata(soi + b"\xff\xe1\x10\x00Exif\x00\x00MM", "JPEG")
    with pytest.raises(MetadataError):  # T.81 B.1.1.4: the length counts its own 2 bytes, so < 2 is invalid
        strip_metadata(soi + b"\xff\xe1\x00\x01" + b"\x00" * 10, "JPEG")
    with pytest.raises(MetadataError):  # tables only, no scan (T.81 B.5 abbreviated format): no image
        strip_metadata(soi + b"\xff\xfe\x00\x04hi\xff\xd9", "JPEG")
    with pytest.raises(MetadataError):  # no marker where one must be
        strip_metadata(soi + b"\xff\xe0\x00\x04hi" + b"junk", "JPEG")
    with pytest.raises(MetadataError):
        strip_metadata(b"", "JPEG")


def test_png_bad_crc():
    # ISO/IEC 15948 sec. 5.3: a CRC-32 over type and data ends every chunk; one flipped bit breaks it.
    data = bytearray(full_png())
    chunks, pos = [], 8
    while pos < len(data):  # find the first IDAT and the tEXt chunk
        length = struct.unpack(">I", data[pos:pos + 4])[0]
        chunks.append((bytes(data[pos + 4:pos + 8]), pos))
        pos += 12 + length
    for ctype in (b"IDAT", b"tEXt"):
        bad = bytearray(data)
        at = dict(chunks)[ctype] + 8
        bad[at] ^= 0x01
        with pytest.raises(MetadataError, match="CRC"):
            strip_metadata(bytes(bad), "PNG")


def test_webp_chunk_past_the_riff_end():
    data = bytearray(samples()["WEBP"])
    data[16:20] = struct.pack("<I", len(data))  # the VP8X chunk claims the whole file
    with pytest.raises(MetadataError):
        strip_metadata(bytes(data), "WEBP")
