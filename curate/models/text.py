"""open_clip text-tower helpers shared by the model loader, the compiled backends and the export:
token lengths, how captions are batched, and the exact forward pass on a batch cut to its longest
caption."""
from __future__ import annotations

from typing import Any


def token_lengths(tokens: Any) -> Any:
    """Per row: index of the last non-padding token + 1 (padding id 0, SimpleTokenizer's)."""
    import torch

    pos = torch.arange(1, tokens.shape[1] + 1, dtype=torch.long)
    return ((tokens != 0).long() * pos).max(dim=1).values


# Trimmed batches are cut to a multiple of this many tokens, fixed by each caption's own length.
LENGTH_STEP = 8


def padded_length(length: int, context: int) -> int:
    """The sequence length a caption of `length` tokens is encoded at when batches are trimmed: its
    own length rounded up to LENGTH_STEP (at least 2, at most the context). It depends on the caption
    alone: in reduced precision (bf16, int8) the rounding of a sum depends on its length, so a
    caption cut to its batch-mates' longest gave a different embedding with different mates
    (measured with torch bf16 on a Zen 4 CPU: up to 1.1e-3 per component)."""
    return min(context, -(-max(2, int(length)) // LENGTH_STEP) * LENGTH_STEP)


def token_batches(tokens: Any, batch: int, trim: bool) -> list[tuple[Any, Any]]:
    """(row indices, token batch) pairs covering every row once. Rows are sorted by length; with
    `trim`, a batch holds captions of one padded_length and is cut to it, so each caption is encoded
    at a length fixed by itself and its embedding does not depend on which captions share its batch.
    Without `trim`, batches keep the full context."""
    import numpy as np
    import torch

    lengths = token_lengths(tokens).numpy()
    order = np.argsort(lengths, kind="stable")
    out = []
    if not trim:
        for i in range(0, len(order), batch):
            idx = order[i:i + batch]
            out.append((idx, tokens[torch.as_tensor(idx)]))
        return out
    context = tokens.shape[1]
    padded = np.array([padded_length(n, context) for n in lengths[order]], dtype=np.int64)
    start = 0
    while start < len(order):
        end = start
        while end < len(order) and end - start < batch and padded[end] == padded[start]:
            end += 1
        idx = order[start:end]
        out.append((idx, tokens[torch.as_tensor(idx)][:, : int(padded[start])]))
        start = end
    return out


def _text_parts(model: Any) -> dict | None:
    """The text tower's pieces when its layout allows exact trimming, else None."""
    import open_clip
    from open_clip.transformer import TextTransformer

    if isinstance(model, open_clip.CLIP):
        parts = dict(tok=model.token_embedding, pos=model.positional_embedding, transformer=model.transformer,
                     ln=model.ln_final, proj=model.text_projection, mask=model.attn_mask,
                     pool=model.text_pool_type, eos=getattr(model, "text_eos_id", None))
    elif isinstance(getattr(model, "text", None), TextTransformer):
        t = model.text
        if t.cls_emb is not None or getattr(t, "use_pad_mask", False):
            return None
        parts = dict(tok=t.token_embedding, pos=t.positional_embedding, transformer=t.transformer,
                     ln=t.ln_final, proj=t.text_projection, mask=t.attn_mask, pool=t.pool_type, eos=t.eos_id)
    else:
        return None
    # Causal mask: a token never attends to later (padding) ones. Pooling must read a token at or
    # before the end token ('argmax' = end token for SimpleTokenizer, 'first', 'eos').
    if parts["mask"] is None or parts["pool"] not in ("argmax", "first", "eos"):
        return None
    return parts


def _encode_text_trimmed(model: Any, tokens: Any) -> Any:
    """open_clip's text forward pass on a batch cut to its longest sequence."""
    import torch.nn as nn
    from open_clip.transformer import text_global_pool

    p = _text_parts(model)
    seq = tokens.shape[1]
    cast = p["transformer"].get_cast_dtype()
    x = p["tok"](tokens).to(cast) + p["pos"][:seq].to(cast)
    x = p["transformer"](x, attn_mask=p["mask"][:seq, :seq])
    x = p["ln"](x)
    x = text_global_pool(x, tokens, p["pool"], eos_token_id=p["eos"])
    proj = p["proj"]
    if proj is not None:
        x = proj(x) if isinstance(proj, nn.Module) else x @ proj
    return x
