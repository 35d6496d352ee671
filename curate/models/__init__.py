"""CLIP models for the embed stage: open_clip names with pretrained tags, local checkpoints, the demo model.

clip: loading and encoding; backends: inference paths (torch, ONNX Runtime, OpenVINO) and the
measured `auto` pick; export: cached ONNX export and static int8; preprocess: decode, normalise,
prefetch. Nothing here imports torch or open_clip at import time; `clip.load_model` does.
"""
