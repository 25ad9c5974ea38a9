"""The JSON API under /api/v1/: the only thing the viewer's pages talk to."""
