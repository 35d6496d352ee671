"""Image sets outside the pipeline (eval benchmarks, another run's output) and their cached codes.

Five kinds of set, told apart by `detect_kind`:
- folder:   every image file under a folder (captions are not needed);
- manifest: a .csv/.jsonl/.parquet with an `image` column of paths;
- tar:      a .tar file or a folder of them;
- shards:   a .parquet file or a folder of them with an `image` bytes column (our shard layout);
- output:   a `curate run` output folder (manifest.json + shards/): every shard it lists.

A set may also be an fsspec URL (`s3://`, `gs://`, `memory://`, ...; `file://` is a local path): it is
listed and read through its store, streaming, never copied to local disk.

Each image gets the same multi-view perceptual codes the pipeline computes (same decode as
`inspect`, same `[hashes]` settings, curate.similarity.image_codes), optionally a CLIP embedding.
Both are cached per set in a
Parquet file keyed by the image's file path + size + mtime and by the settings, so a second
leakcheck or run against an unchanged benchmark reads no image at all.
"""
from __future__ import annotations

import logging
import os
from concurrent.futures import ProcessPoolExecutor
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Callable, Iterator, Sequence

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

from . import similarity
from .errors import InputError

log = logging.getLogger(__name__)

KINDS = ("folder", "manifest", "tar", "shards", "output")
# Images handed to one worker call (common practice: large enough to hide the pickling cost).
CHUNK = 32
# Fewer images than this are hashed in this process: starting worker processes took about 1 s on the
# 2-core test machine, the time to hash some 70 demo images (measured with `curate leakcheck --workers`).
PARALLEL_MIN = 500


@dataclass
class ImageSet:
    """A listed set: one entry per image, in a stable order."""

    root: str  # absolute path of the set as given
    kind: str  # one of KINDS
    names: list[str]  # what reports show: path relative to the root, or a shard row's `source`
    refs: list[str]  # where the image lives: absolute file, `tar::member`, or `part.parquet#row`
    stamps: list[tuple[int, int]]  # (size, mtime_ns) of the file holding each image, for the cache
    problems: list[str | None]  # a reason the entry cannot be read at all, else None
    # For shards/output: (part file, row) per entry; for the others, unused.
    rows: list[tuple[str, int]] = field(default_factory=list)
    # Largest image read, in bytes (the run's input.max_file_bytes); None: that setting's default.
    max_bytes: int | None = None

    def __len__(self) -> int:
        return len(self.names)

    def read(self, idx: Sequence[int]) -> Iterator[bytes | Exception]:
        """Image bytes of the given entries, in the given order (ascending is fastest)."""
        from .config import InputConfig

        cap = InputConfig.max_file_bytes if self.max_bytes is None else self.max_bytes
        if self.kind in ("shards", "output"):
            for data in _read_shard_rows([self.rows[i] for i in idx]):
                if isinstance(data, bytes) and len(data) > cap:
                    data = OSError(f"{len(data)} bytes, over the {cap}-byte limit (input.max_file_bytes); not read")
                yield data
            return
        from .sources import read_bytes

        yield from read_bytes([self.refs[i] for i in idx], max_bytes=cap)


# --------------------------------------------------------------------------- listing


def detect_kind(path: str) -> str:
    """The kind of set at an existing absolute path (see the module docstring)."""
    from .sources.common import is_image_name, is_tar_name, walk

    if os.path.isfile(path):
        ext = os.path.splitext(path)[1].lower()
        if ext == ".parquet" and _has_image_bytes(path):
            return "shards"
        if ext in (".csv", ".jsonl", ".parquet"):
            return "manifest"
        if is_tar_name(path):
            return "tar"
        raise InputError(f"{path}: not a set of images; give a folder, a manifest, a .tar, "
                         "a shard folder or a curate output")
    if os.path.isfile(os.path.join(path, "manifest.json")) and os.path.isdir(os.path.join(path, "shards")):
        return "output"
    images = tars = parquets = 0
    try:
        for _rel, entries, _dirs in walk(path):
            for e in entries:
                if is_image_name(e.name):
                    images += 1
                    break
                tars += is_tar_name(e.name)
                parquets += e.name.lower().endswith(".parquet")
            if images:
                break
    except OSError as e:
        raise InputError(f"{path}: cannot be read ({e.strerror or e}); check its permissions") from e
    if images:
        return "folder"
    if tars:
        return "tar"
    if parquets:
        return "shards"
    return "folder"  # an empty folder is an empty set


def list_set(path: str | Path, max_bytes: int | None = None) -> ImageSet:
    """List a set of images (a local path or a URL). Raises InputError when the path is missing or
    of no known kind. `max_bytes`: the largest image read later (default: input.max_file_bytes's
    default)."""
    images = _list_set(path)
    images.max_bytes = max_bytes
    return images


def _list_set(path: str | Path) -> ImageSet:
    from .sources.stores import local_path

    local = local_path(str(path))
    if local is None:
        root = str(path)
        kind = _store_kind(root)
        if kind in ("shards", "output"):
            return _list_parts(root, kind, _store_parts(root, kind))
    else:
        root = os.path.abspath(os.path.expanduser(local))
        if not os.path.exists(root):
            raise InputError(f"{root}: does not exist")
        kind = detect_kind(root)
        if kind in ("shards", "output"):
            parts = _output_parts(root) if kind == "output" else _shard_parts(root)
            return _list_parts(root, kind, parts)
    from .config import InputConfig
    from .sources import list_samples

    # Captions are not used here: point the caption column at the image column so a manifest
    # without captions (a benchmark's file list) still reads.
    cfg = InputConfig(path=root, format=kind, image_column="image", caption_column="image")
    t = list_samples(cfg)
    names = t.column("source").to_pylist()
    refs = t.column("locator").to_pylist()
    sizes = t.column("file_size").to_pylist()
    mtimes = t.column("mtime_ns").to_pylist()
    problems = t.column("source_problem").to_pylist()
    if kind == "tar":
        # A member's own mtime says little about a rewritten archive: add the archive's stamp.
        from .sources import split_locator

        stamps = []
        for ref, s, m in zip(refs, sizes, mtimes):
            loc = split_locator(ref or "")
            st = _stat(loc[0]) if loc else (0, 0)
            stamps.append((int(s or 0) ^ st[0], int(m or 0) ^ st[1]))
    else:
        stamps = [(int(s or 0), int(m or 0)) for s, m in zip(sizes, mtimes)]
    return ImageSet(root, kind, names, refs, stamps, problems)


def _stat(path: str) -> tuple[int, int]:
    from .sources import stores

    if stores.is_url(path) and stores.local_path(path) is None:
        try:
            store, inner = stores.open_url(path)
            size, mtime = stores.stamp(store.info(inner))
        except Exception:  # noqa: BLE001 - no stamp: the cache entry is simply not trusted
            return 0, 0
        return int(size or 0), int(mtime or 0)
    try:
        st = os.stat(path)
        return st.st_size, st.st_mtime_ns
    except OSError:
        return 0, 0


def _parquet(path: str) -> pq.ParquetFile:
    """A Parquet file by local path or URL (read through its store, never copied)."""
    from .sources import stores

    if stores.is_url(path) and stores.local_path(path) is None:
        store, inner = stores.open_url(path)
        return pq.ParquetFile(store.open(inner))
    return pq.ParquetFile(path)


def _store_kind(url: str) -> str:
    """detect_kind for a URL (the set's files are listed through its store)."""
    from .sources import detect_format, stores
    from .sources.common import is_image_name, is_tar_name

    store, path = stores.open_url(url)
    try:
        info = store.info(path)
    except FileNotFoundError:
        raise InputError(f"{url}: does not exist") from None
    except Exception as e:  # noqa: BLE001 - a store raises its own kinds (permissions, network)
        raise InputError(f"{url}: cannot be read ({e})") from e
    if stores.kind_of(info) != "dir":
        if url.lower().endswith(".parquet") and _has_image_bytes(url):
            return "shards"
        return detect_format(url)
    if store.fs.isfile(stores.join(path, "manifest.json")) and store.fs.isdir(stores.join(path, "shards")):
        return "output"
    names = [p.rsplit("/", 1)[-1] for p in store.fs.find(path)]
    if any(is_image_name(n) for n in names):
        return "folder"
    if any(is_tar_name(n) for n in names):
        return "tar"
    if any(n.lower().endswith(".parquet") for n in names):
        return "shards"
    return "folder"


def _store_parquets(store: Any, path: str) -> list[str]:
    return sorted(store.url(p) for p in store.fs.find(path) if p.lower().endswith(".parquet")
                  and not p.rsplit("/", 1)[-1].startswith("."))


def _store_parts(url: str, kind: str) -> list[str]:
    import json

    from .sources import stores

    store, path = stores.open_url(url)
    if kind == "output":
        try:
            with store.open(stores.join(path, "manifest.json")) as f:
                manifest = json.loads(f.read().decode("utf-8"))
        except (OSError, ValueError) as e:
            raise InputError(f"{url}/manifest.json: cannot be read ({e})") from e
        entries = manifest.get("shards") or []
        return [store.url(stores.join(path, e["path"])) for e in entries if isinstance(e, dict) and e.get("path")]
    if not store.fs.isdir(path):
        return [url]
    keep = [p for p in _store_parquets(store, path) if _has_image_bytes(p)]
    if not keep:
        raise InputError(f"{url}: no Parquet file with an `image` bytes column under it")
    return keep


def _has_image_bytes(path: str) -> bool:
    try:
        schema = _parquet(path).schema_arrow
    except (OSError, pa.ArrowInvalid, InputError):
        return False
    i = schema.get_field_index("image")
    return i >= 0 and (pa.types.is_binary(schema.field(i).type) or pa.types.is_large_binary(schema.field(i).type))


def _shard_parts(root: str) -> list[str]:
    if os.path.isfile(root):
        return [root]
    parts = sorted(str(p) for p in Path(root).rglob("*.parquet") if not p.name.startswith("."))
    keep = [p for p in parts if _has_image_bytes(p)]
    if not keep:
        raise InputError(f"{root}: no Parquet file with an `image` bytes column under it")
    return keep


def _output_parts(root: str) -> list[str]:
    import json

    try:
        manifest = json.loads(Path(root, "manifest.json").read_text(encoding="utf-8"))
    except (OSError, ValueError) as e:
        raise InputError(f"{root}/manifest.json: cannot be read ({e})") from e
    entries = manifest.get("shards") or []
    parts = [os.path.join(root, e["path"]) for e in entries if isinstance(e, dict) and e.get("path")]
    missing = [p for p in parts if not os.path.isfile(p)]
    if missing:
        raise InputError(f"{root}: manifest.json lists {missing[0]}, which is missing")
    return parts


def _list_parts(root: str, kind: str, parts: list[str]) -> ImageSet:
    names: list[str] = []
    refs: list[str] = []
    stamps: list[tuple[int, int]] = []
    rows: list[tuple[str, int]] = []
    base = _base(root)
    for part in parts:
        try:
            pf = _parquet(part)
            has_source = "source" in pf.schema_arrow.names
            sources = pf.read(columns=["source"]).column("source").to_pylist() if has_source else None
            n = pf.metadata.num_rows
        except (OSError, pa.ArrowInvalid) as e:
            raise InputError(f"{part}: not a readable Parquet shard ({e})") from e
        stamp = _stat(part)
        rel = part[len(base) + 1:] if part.startswith(base + "/") else os.path.relpath(part, base).replace(os.sep, "/")
        for r in range(n):
            src = sources[r] if sources is not None else None
            names.append(src if src else f"{rel}#{r}")
            refs.append(f"{part}#{r}")
            stamps.append(stamp)
            rows.append((part, r))
    return ImageSet(root, kind, names, refs, stamps, [None] * len(names), rows)


def _base(root: str) -> str:
    """The folder that names of shard rows are relative to: the root, or the folder of a root file."""
    from .sources import stores

    if stores.is_url(root) and stores.local_path(root) is None:
        store, path = stores.open_url(root)
        return root.rstrip("/") if store.fs.isdir(path) else root.rsplit("/", 1)[0]
    return root if os.path.isdir(root) else os.path.dirname(root)


def _read_shard_rows(rows: list[tuple[str, int]]) -> Iterator[bytes | Exception]:
    """Bytes of (part, row) entries, reading each part's `image` column one batch at a time."""
    i = 0
    while i < len(rows):
        part = rows[i][0]
        j = i
        while j < len(rows) and rows[j][0] == part:
            j += 1
        wanted = [r for _, r in rows[i:j]]
        try:
            got = _part_rows(part, wanted)
        except (OSError, pa.ArrowInvalid) as e:
            got = {r: e for r in wanted}
        for r in wanted:
            yield got[r]
        i = j


def _part_rows(part: str, wanted: list[int]) -> dict[int, bytes | Exception]:
    need = set(wanted)
    out: dict[int, bytes | Exception] = {}
    pf = _parquet(part)
    start = 0
    for batch in pf.iter_batches(columns=["image"], batch_size=256):
        col = batch.column(0)
        for k in range(batch.num_rows):
            if start + k in need:
                v = col[k].as_py()
                out[start + k] = v if v is not None else ValueError("null image")
        start += batch.num_rows
        if len(out) == len(need):
            break
    for r in need - set(out):
        out[r] = IndexError(f"{part}: no row {r}")
    return out


# --------------------------------------------------------------------------- codes


@dataclass(frozen=True)
class HashSettings:
    """What decides an image's codes: the decode (inspect) and the `[hashes]` section."""

    inspect: Any  # curate.stages.inspect.InspectConfig
    hashes: Any  # curate.stages.hashes.HashesConfig

    def key(self) -> dict:
        import dataclasses

        # Only what changes the pixels hashed or the codes: the decode's draft size and the
        # code settings; the inspect size checks do not matter here.
        return {"draft_short_side": self.inspect.draft_short_side, "max_pixels": self.inspect.max_pixels,
                "codes": dataclasses.asdict(code_settings(self.hashes)), "codes_version": similarity.codes.VERSION}

    def code_settings(self) -> similarity.CodeSettings:
        return code_settings(self.hashes)


def code_settings(hcfg: Any) -> similarity.CodeSettings:
    """The code settings of a `[hashes]` section (its fields of the same names)."""
    import dataclasses

    if type(hcfg) is similarity.CodeSettings:
        return hcfg
    names = {f.name for f in dataclasses.fields(similarity.CodeSettings)}
    kw = {k: getattr(hcfg, k) for k in names if hasattr(hcfg, k)}
    # A section from before transforms and check codes makes the codes it always made: `flip`
    # meant the mirror view, and there was no check code.
    if "transforms" not in kw:
        kw["transforms"] = ["mirror"] if getattr(hcfg, "flip", False) else []
    kw.setdefault("check", "")
    return similarity.CodeSettings(**{k: list(v) if isinstance(v, (list, tuple)) else v for k, v in kw.items()})


def default_settings(config: Any = None) -> HashSettings:
    """Settings from a resolved pipeline config, or the built-in defaults."""
    from .stages.hashes import HashesConfig
    from .stages.inspect import InspectConfig

    if config is None:
        return HashSettings(InspectConfig(), HashesConfig())
    return HashSettings(config.inspect, config.hashes)


def codes_of_bytes(data: bytes | Exception, settings: HashSettings) -> tuple[np.ndarray | None, str | None]:
    """(codes uint64[K], None) for one image, or (None, reason) when it does not decode."""
    from .stages.inspect import inspect_one

    cols, checks, rgb = inspect_one(data, settings.inspect)
    if rgb is None:
        failed = [c["code"] for c in checks if c["failed"]]
        return None, (failed[-1] if failed else "decode_error")
    try:
        return image_codes_for(rgb, settings.hashes), None
    except Exception as e:  # noqa: BLE001 - one bad image is its own reason
        return None, f"hash_error: {type(e).__name__}"


def image_codes_for(rgb: Any, hcfg: Any) -> np.ndarray:
    """The codes the `[hashes]` section makes for one decoded image (the pipeline's own call)."""
    return similarity.image_codes(rgb, code_settings(hcfg))


def codes_per_image(hcfg: Any) -> int:
    return similarity.code_count(code_settings(hcfg))


def codes_matrix(table: pa.Table, hcfg: Any) -> tuple[np.ndarray | None, np.ndarray]:
    """(n, K) codes from the hash column inspect wrote, and which rows have them (None: no column)."""
    from .stages import hashes as hmod

    col = hmod.CODES
    if col not in table.column_names:
        return None, np.zeros(table.num_rows, dtype=bool)
    return hmod.codes_matrix(table.column(col), hmod.variants(hcfg))


def _codes_chunk(datas: list[bytes | Exception], settings: HashSettings) -> list[tuple[Any, Any]]:
    return [codes_of_bytes(d, settings) for d in datas]


@dataclass
class SetCodes:
    """Codes of every entry of a set: (n, K) uint64; `ok` is False where an image did not decode."""

    images: ImageSet
    codes: np.ndarray
    ok: np.ndarray
    problems: list[str | None]
    computed: int  # entries hashed now (the rest came from the cache)
    settings: similarity.CodeSettings | None = None  # what made the codes (None: one code per view, all identity)

    @property
    def views(self) -> list[similarity.View] | None:
        return None if self.settings is None else similarity.views(self.settings)

    @property
    def identity(self) -> int | None:
        """How many leading views are identity views (None: all)."""
        return None if self.settings is None else similarity.identity_count(self.settings)

    @property
    def main(self) -> np.ndarray:
        """(n, views) main codes."""
        return self.codes if self.settings is None else similarity.split_codes(self.codes, self.settings)[0]

    @property
    def checks(self) -> np.ndarray | None:
        """(n, views) check codes, or None."""
        return None if self.settings is None else similarity.split_codes(self.codes, self.settings)[1]


def _cache_file(cache_dir: str, root: str, what: str, settings_key: Any) -> Path:
    from .workdir import fingerprint

    return Path(cache_dir) / f"{what}-{fingerprint(root, settings_key)[:24]}.parquet"


def _load_cache(path: Path | None, fp: str) -> dict[str, tuple[int, int, Any, str | None]]:
    from .workdir import stored_fingerprint

    if path is None or not path.exists() or stored_fingerprint(path) != fp:
        return {}
    try:
        t = pq.ParquetFile(path).read()  # not pq.read_table: its dataset import alone takes 0.5 s
    except (OSError, pa.ArrowInvalid):
        return {}
    out = {}
    for ref, size, mtime, val, prob in zip(*(t.column(c).to_pylist() for c in ("ref", "size", "mtime_ns", "value",
                                                                             "problem"))):
        out[ref] = (size, mtime, val, prob)
    return out


def _cached_map(images: ImageSet, what: str, settings_key: Any, cache_dir: str | None,
                compute: Callable[[list[int]], list[tuple[Any, str | None]]],
                value_type: pa.DataType) -> tuple[list[Any], list[str | None], int]:
    """Per entry (value, problem): from the cache where path+size+mtime match, else computed."""
    from .workdir import fingerprint, write_table

    fp = fingerprint(what, settings_key)
    path = _cache_file(cache_dir, images.root, what, settings_key) if cache_dir else None
    cache = _load_cache(path, fp)
    n = len(images)
    values: list[Any] = [None] * n
    problems: list[str | None] = [None] * n
    todo: list[int] = []
    for i in range(n):
        if images.problems[i] is not None:
            problems[i] = images.problems[i]
            continue
        hit = cache.get(images.refs[i])
        if hit is not None and (hit[0], hit[1]) == images.stamps[i]:
            values[i], problems[i] = hit[2], hit[3]
        else:
            todo.append(i)
    if todo:
        for i, (v, p) in zip(todo, compute(todo)):
            values[i], problems[i] = v, p
    if path is not None and (todo or len(cache) != n):
        table = pa.table({
            "ref": pa.array(images.refs, pa.string()),
            "size": pa.array([s for s, _ in images.stamps], pa.int64()),
            "mtime_ns": pa.array([m for _, m in images.stamps], pa.int64()),
            "value": pa.array([None if v is None else list(v) for v in values], value_type),
            "problem": pa.array(problems, pa.string()),
        })
        write_table(path, table, fp=fp)
    return values, problems, len(todo)


def set_codes(images: ImageSet, settings: HashSettings, *, cache_dir: str | None = None,
              workers: int = 1) -> SetCodes:
    """Perceptual codes of every image of a set (cached when `cache_dir` is given)."""
    k = codes_per_image(settings.hashes)

    def compute(idx: list[int]) -> list[tuple[Any, str | None]]:
        return _map_chunks(images, idx, _codes_chunk, (settings,), workers)

    values, problems, computed = _cached_map(images, "codes", settings.key(), cache_dir, compute,
                                             pa.list_(pa.uint64()))
    codes = np.zeros((len(images), k), dtype=np.uint64)
    ok = np.zeros(len(images), dtype=bool)
    for i, v in enumerate(values):
        if v is not None and len(v) == k:
            codes[i] = np.asarray(v, dtype=np.uint64)
            ok[i] = True
    return SetCodes(images, codes, ok, problems, computed, settings.code_settings())


def _map_chunks(images: ImageSet, idx: list[int], fn: Callable, args: tuple, workers: int) -> list:
    """fn(list of image bytes, *args) over chunks of the entries, in worker processes when workers > 1."""
    chunks = [idx[s:s + CHUNK] for s in range(0, len(idx), CHUNK)]
    out: list = []
    if workers <= 1 or len(idx) < PARALLEL_MIN:
        for ch in chunks:
            out.extend(fn(list(images.read(ch)), *args))
        return out
    import multiprocessing as mp

    ctx = mp.get_context("forkserver")
    with ProcessPoolExecutor(max_workers=workers, mp_context=ctx) as pool:
        pending: list = []
        for ch in chunks:
            pending.append(pool.submit(fn, list(images.read(ch)), *args))
            if len(pending) >= 2 * workers:  # bounded: at most 2 chunks per worker held in memory
                out.extend(pending.pop(0).result())
        for f in pending:
            out.extend(f.result())
    return out


# --------------------------------------------------------------------------- embeddings


@dataclass
class SetEmbeddings:
    images: ImageSet
    emb: np.ndarray  # (n, D) float32, L2-normalised; zero rows where `ok` is False
    ok: np.ndarray
    computed: int
    path: dict = field(default_factory=dict)  # the model's inference path (curate.stages.embed.inference_path)


def set_embeddings(images: ImageSet, view: Any, *, cache_dir: str | None = None) -> SetEmbeddings:
    """CLIP image embeddings of every image, made exactly as the embed stage makes them: the model on the
    run's inference path (curate.stages.embed.load: same backend, precision, int8 scales and `auto` pick),
    the same decode and preprocessing. `view`: a config view with the [embed] and [input] sections.
    Cached per weights, image-tower path (with the calibration digest when int8) and decode rule."""
    from .models import clip
    from .stages import embed

    cfg = view.section("embed")
    lm = embed.load(view)
    path = embed.inference_path(lm)
    decode = embed.model_decoder(lm, cfg)
    batch = max(1, int(cfg.batch_size))

    def compute(idx: list[int]) -> list[tuple[Any, str | None]]:
        out: list[tuple[Any, str | None]] = []
        for s in range(0, len(idx), batch):
            ch = idx[s:s + batch]
            res: list[tuple[Any, str | None]] = [(None, "decode_error")] * len(ch)
            pixels, where = [], []
            for k, data in enumerate(images.read(ch)):
                try:
                    pixels.append(decode(data))
                    where.append(k)
                except Exception as e:  # noqa: BLE001 - one bad image is its own reason
                    res[k] = (None, f"decode_error: {type(e).__name__}")
            if pixels:
                emb = lm.encode_images(np.stack(pixels))
                for k, e in zip(where, emb):
                    res[k] = (e.astype(np.float32).tolist(), None)
            out.extend(res)
        return out

    # Only the image tower makes these numbers: its path, and its int8 scales' calibration batch.
    tower = {"image": path["image"]}
    if path["image"].endswith("-int8"):
        tower["calibration_sha256"] = path["calibration_sha256"]
    key = {"model": clip.identity(cfg.model, cfg.pretrained, cfg.cache_dir or None), "path": tower,
           "quantize": bool(cfg.quantize), "decode": decode.key()}
    values, _problems, computed = _cached_map(images, "emb", key, cache_dir, compute, pa.list_(pa.float32()))
    dim = next((len(v) for v in values if v is not None), 0)
    emb = np.zeros((len(images), dim), dtype=np.float32)
    ok = np.zeros(len(images), dtype=bool)
    for i, v in enumerate(values):
        if v is not None:
            emb[i] = v
            ok[i] = True
    return SetEmbeddings(images, emb, ok, computed, path)


# Split's eval-set check still calls this name; the search itself is curate.similarity's.
cross_cosine = similarity.cross_cosine
