"""curate: caption-image corpus curation for text-to-image training."""
__version__ = "0.1.0"
