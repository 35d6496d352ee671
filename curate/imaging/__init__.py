"""Measurements on one decoded image: quality, faces, overlays, metadata.

Pure functions of pixels (and of the facts the decoder reported); the stages
in curate.stages turn their numbers into check records.
"""
