"""Export open_clip towers to ONNX (fp32 and static int8), cached once per weights digest.

Cache layout, under `<cache_dir or $XDG_CACHE_HOME or ~/.cache>/curate-exports/`:

    <weights sha256[:16]>/<tower>-<format>-<key>/model.onnx   the exported graph
                                                 /meta.json    versions, timings, sizes
    <weights sha256[:16]>/choice-<key>.json                     a remembered `auto` pick

`key` hashes everything that changes the file: weights digest, tower, format, opset, export
recipe version, torch/onnx/onnxruntime versions and, for int8, the calibration inputs. Entries
are built in a temporary folder and renamed into place, so a crash leaves no half entry and two
processes racing on one entry both end up with a complete one.

onnx, onnxscript and onnxruntime are optional (pip extra `onnx`); importing them is deferred to
the functions that need them and a missing one raises ModelError naming the extra.
"""
from __future__ import annotations

import contextlib
import hashlib
import io
import json
import logging
import os
import shutil
import time
import uuid
from collections.abc import Callable, Sequence
from pathlib import Path
from typing import Any

from ..errors import ModelError

log = logging.getLogger(__name__)

# ONNX opset of the exported graphs: 18 is the lowest torch's exporter writes natively (common
# practice: pin it so a torch upgrade does not silently change the cached files).
OPSET = 18
# Bump when the export or quantisation recipe changes, so old cache entries are not reused.
RECIPE = 1
# Graphs whose weights exceed this are saved with ONNX external data (protobuf's 2 GiB limit).
INLINE_LIMIT = 1_500_000_000
CACHE_FOLDER = "curate-exports"
MODEL_FILE = "model.onnx"


def require(module: str, extra: str) -> Any:
    """Import an optional runtime or raise ModelError naming the pip extra that provides it."""
    import importlib

    try:
        return importlib.import_module(module)
    except ImportError as e:
        raise ModelError(f"{module} is not installed: install curate's optional extra "
                         f"(pip install 'curate[{extra}]') or use embed.backend = 'torch'") from e


def versions(*modules: str) -> dict[str, str]:
    """Installed versions of the named modules (absent ones are skipped)."""
    import importlib

    out = {}
    for name in modules:
        try:
            out[name] = str(importlib.import_module(name).__version__)
        except ImportError:
            continue
    return out


def cache_root(cache_dir: str | None) -> Path:
    """Folder for exported graphs: beside the weights cache when one is configured."""
    if cache_dir:
        return Path(cache_dir) / CACHE_FOLDER
    base = os.environ.get("XDG_CACHE_HOME") or str(Path.home() / ".cache")
    return Path(base) / CACHE_FOLDER


def entry_key(parts: dict) -> str:
    return hashlib.sha256(json.dumps(parts, sort_keys=True).encode()).hexdigest()[:16]


def folder_size(path: Path) -> int:
    return sum(p.stat().st_size for p in path.rglob("*") if p.is_file())


def cached_entry(root: Path, name: str, build: Callable[[Path], dict]) -> tuple[Path, dict]:
    """Return (folder, meta) of a cache entry, building it atomically the first time.

    `build(tmp)` writes the entry's files into `tmp` and returns metadata; the folder is renamed
    to `root/name` only when complete.
    """
    final = root / name
    meta_path = final / "meta.json"
    if meta_path.is_file():
        try:
            meta = json.loads(meta_path.read_text(encoding="utf-8"))
            meta["reused"] = True
            return final, meta
        except ValueError:
            shutil.rmtree(final, ignore_errors=True)  # damaged: rebuild below
    root.mkdir(parents=True, exist_ok=True)
    tmp = root / f".tmp-{name}-{uuid.uuid4().hex[:8]}"
    tmp.mkdir()
    try:
        t0 = time.perf_counter()
        meta = build(tmp)
        meta["build_s"] = round(time.perf_counter() - t0, 2)
        meta["bytes"] = folder_size(tmp)
        (tmp / "meta.json").write_text(json.dumps(meta, indent=1, sort_keys=True), encoding="utf-8")
        try:
            os.rename(tmp, final)
        except OSError:
            if not meta_path.is_file():  # not a lost race: a real failure
                raise
            shutil.rmtree(tmp, ignore_errors=True)
            meta = json.loads(meta_path.read_text(encoding="utf-8"))
            meta["reused"] = True
            return final, meta
    except BaseException:
        shutil.rmtree(tmp, ignore_errors=True)
        raise
    meta["reused"] = False
    return final, meta


@contextlib.contextmanager
def _quiet():
    """The exporters and the quantiser print progress; library code must not."""
    with contextlib.redirect_stdout(io.StringIO()), contextlib.redirect_stderr(io.StringIO()):
        import warnings

        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            yield


def _tower_module(net: Any, tower: str, trim_text: bool) -> Any:
    """An nn.Module wrapping one tower: image (pixels -> features) or text (tokens -> features)."""
    import torch

    from .text import _encode_text_trimmed

    class Image(torch.nn.Module):
        def __init__(self, m: Any):
            super().__init__()
            self.m = m

        def forward(self, x: Any) -> Any:
            return self.m.encode_image(x)

    class Text(torch.nn.Module):
        def __init__(self, m: Any):
            super().__init__()
            self.m = m

        def forward(self, tokens: Any) -> Any:
            return _encode_text_trimmed(self.m, tokens) if trim_text else self.m.encode_text(tokens)

    return (Image(net) if tower == "image" else Text(net)).eval()


def export_onnx(net: Any, tower: str, path: Path, image_hw: tuple[int, int], context_length: int,
                trim_text: bool) -> None:
    """Write one fp32 tower of an open_clip model as ONNX with a dynamic batch (and length) axis.

    Text towers that trim exactly take tokens cut to any length <= the context; others take the
    full context.
    """
    require("onnx", "onnx")
    require("onnxscript", "onnx")
    import torch

    params = sum(p.numel() * p.element_size() for p in net.parameters())
    module = _tower_module(net, tower, trim_text)
    batch = torch.export.Dim("batch", min=1, max=1 << 16)
    if tower == "image":
        example = (torch.zeros(2, 3, *image_hw),)
        dyn = ({0: batch},)
        names = ["pixels"]
    else:
        seq = 8 if trim_text else context_length
        example = (torch.ones(2, seq, dtype=torch.long),)
        dyn = ({0: batch, 1: torch.export.Dim("length", min=2, max=context_length)},) if trim_text \
            else ({0: batch},)
        names = ["tokens"]
    try:
        with _quiet(), torch.no_grad():
            torch.onnx.export(module, example, str(path), dynamo=True, opset_version=OPSET,
                              input_names=names, output_names=["features"], dynamic_shapes=dyn,
                              external_data=params > INLINE_LIMIT, verbose=False)
    except Exception as e:  # noqa: BLE001 - an architecture the exporter cannot trace
        raise ModelError(f"cannot export the {tower} tower to ONNX: {type(e).__name__}: "
                         f"{str(e).splitlines()[0][:300] if str(e) else ''}; use embed.backend = 'torch'") from e


def linear_nodes(model_path: Path) -> list[str]:
    """Names of MatMul/Gemm nodes whose second input is a stored weight (the Linear layers).

    Products of two activations (attention scores, attention-weighted values) stay in float:
    a static scale fitted to them on a few samples generalises poorly (common practice).
    """
    import onnx

    m = onnx.load(str(model_path), load_external_data=False)
    weights = {i.name for i in m.graph.initializer}
    return [n.name for n in m.graph.node
            if n.op_type in ("MatMul", "Gemm") and len(n.input) > 1 and n.input[1] in weights]


def quantize_static_int8(src: Path, dst: Path, feeds: Sequence[dict], reduce_range: bool) -> dict:
    """Static int8 (QDQ) copy of an fp32 ONNX graph, activation ranges fitted on `feeds`.

    Weights: int8 per output channel, symmetric; activations: uint8 per tensor with fixed scales
    (min/max over the calibration feeds), so an item's result never depends on its batch-mates.
    `reduce_range` keeps weights to 7 bits, which avoids the int16 overflow of AVX2 int8 dot
    products on CPUs without VNNI (onnxruntime's quantisation guide).
    """
    require("onnxruntime", "onnx")
    from onnxruntime.quantization import (
        CalibrationDataReader,
        CalibrationMethod,
        QuantFormat,
        QuantType,
        quantize_static,
    )
    from onnxruntime.quantization.shape_inference import quant_pre_process

    class Reader(CalibrationDataReader):
        def __init__(self) -> None:
            self.it = iter(feeds)

        def get_next(self) -> dict | None:
            return next(self.it, None)

    large = src.stat().st_size > INLINE_LIMIT or any(p.suffix != ".onnx" for p in src.parent.iterdir()
                                                     if p.is_file() and p.name != "meta.json")
    pre = dst.parent / "pre.onnx"
    with _quiet():
        quant_pre_process(str(src), str(pre), skip_symbolic_shape=True, save_as_external_data=large)
        nodes = linear_nodes(pre)
        quantize_static(str(pre), str(dst), Reader(), quant_format=QuantFormat.QDQ, per_channel=True,
                        activation_type=QuantType.QUInt8, weight_type=QuantType.QInt8,
                        calibrate_method=CalibrationMethod.MinMax, nodes_to_quantize=nodes,
                        reduce_range=reduce_range, use_external_data_format=large,
                        extra_options={"ActivationSymmetric": False, "WeightSymmetric": True})
    for p in dst.parent.iterdir():
        if p.name.startswith("pre.onnx"):
            p.unlink()
    return {"quantized_nodes": len(nodes), "reduce_range": bool(reduce_range)}
