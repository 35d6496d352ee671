"""Shared fixtures: small real images made with Pillow, a tiny corpus, the sample corpus."""
from __future__ import annotations

import io
import subprocess
import sys
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]


def jpeg_bytes(size=(400, 300), color=(180, 60, 40), quality=90, noise=True, **save_kw) -> bytes:
    import numpy as np
    from PIL import Image

    rng = np.random.default_rng(sum(size) + sum(color))
    arr = np.empty((size[1], size[0], 3), np.uint8)
    arr[:] = color
    if noise:
        arr = np.clip(arr.astype(int) + rng.integers(-40, 40, arr.shape), 0, 255).astype(np.uint8)
    buf = io.BytesIO()
    Image.fromarray(arr).save(buf, "JPEG", quality=quality, **save_kw)
    return buf.getvalue()


@pytest.fixture(scope="session")
def sample_corpus(tmp_path_factory) -> Path:
    """The demo corpus, generated once per test session by its committed script."""
    out = tmp_path_factory.mktemp("corpus") / "images"
    subprocess.run([sys.executable, str(ROOT / "sample_corpus" / "make_corpus.py"), "--out", str(out)],
                   check=True, cwd=ROOT)
    return out


def textured(arr_small, size, rng):
    """A smooth random picture of `size` with fine grain on top, so it reads as a photograph to the
    image-quality checks (a test fixture; plain upscaled blobs are flagged as upscaled and flat)."""
    import numpy as np
    from PIL import Image

    img = np.asarray(Image.fromarray(arr_small).resize(size, Image.Resampling.BICUBIC), np.int16)
    grain = rng.integers(-24, 25, img.shape, dtype=np.int16)
    return Image.fromarray(np.clip(img + grain, 0, 255).astype(np.uint8))


def make_small_corpus(root: Path, n: int = 40, seed: int = 0) -> Path:
    """n distinct noisy JPEGs with sidecar captions (a test fixture; not the demo corpus)."""
    import numpy as np

    rng = np.random.default_rng(seed)
    root.mkdir(parents=True, exist_ok=True)
    colours = ["red", "blue", "green", "amber", "white", "black", "teal", "ochre"]
    items = ["mug", "bowl", "vase", "plate", "jug"]
    for i in range(n):
        arr = rng.integers(0, 255, (8, 8, 3)).astype(np.uint8)
        img = textured(arr, (320 + 8 * (i % 5), 320), rng)
        sub = root / ("a" if i % 2 else "b")
        sub.mkdir(exist_ok=True)
        img.save(sub / f"item{i:03d}.jpg", quality=92)
        (sub / f"item{i:03d}.txt").write_text(
            f"a {colours[i % len(colours)]} {items[i % len(items)]} number {i} on a table", encoding="utf-8"
        )
    return root


# Property tests explore the same examples on every run, so CI results do not depend on luck.
from hypothesis import settings as _hyp_settings  # noqa: E402

_hyp_settings.register_profile("curate", derandomize=True, deadline=None)
_hyp_settings.load_profile("curate")


def scene_photo(seed: int, size=(320, 240)):
    """One Kilnworks scene drawn by the demo renderer (demo data, for set-level tests)."""
    import random

    sys.path.insert(0, str(ROOT / "sample_corpus"))
    import workshop

    rng = random.Random(seed)
    return workshop.render(workshop.random_spec(rng), size, rng)


def to_jpeg(img, quality=90) -> bytes:
    import io

    buf = io.BytesIO()
    img.save(buf, "JPEG", quality=quality)
    return buf.getvalue()


def pipeline_config(*sets: str, path=None):
    """A resolved pipeline config: built-in defaults < `path` < `sets`."""
    from curate.config import load_config
    from curate.plan import config_sections

    return load_config(path, sets=list(sets), sections=config_sections())


def stage_call(name: str, table, *sets: str, cfg=None, **ctx_kw):
    """Call one registered stage's function on a table the way the runner does (its config view)."""
    from curate.stages import REGISTRY, StageContext

    cfg = cfg if cfg is not None else pipeline_config(*sets)
    st = REGISTRY[name]
    view = st.view(cfg)
    return st.fn(table, view.section(st.config_section), StageContext(config=view, **ctx_kw))
