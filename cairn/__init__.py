"""cairn: multi-reader landmark studies on 3D medical images."""

from .celery import app as celery_app

__all__ = ["celery_app"]
__version__ = "0.1.0"
