"""CLIP models for the embed stage: open_clip names with pretrained tags, local checkpoints, the demo model.

Nothing here imports torch or open_clip at import time; `clip.load_model` does.
"""
