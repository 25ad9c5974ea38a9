from __future__ import annotations

from django.apps import AppConfig


class ViewerConfig(AppConfig):
    name = "viewer"
    verbose_name = "Viewer pages"
